package consumer

import (
	"context"
	"encoding/json"
	"hash/fnv"
	"testing"
	"time"

	"ripen/state"
)

func TestGroupTimes(t *testing.T) {
	c0 := state.TopicPartition{Topic: "clicks", Partition: 0}
	c1 := state.TopicPartition{Topic: "clicks", Partition: 1}
	v0 := state.TopicPartition{Topic: "conversions", Partition: 0}
	meta := partitionMeta{all: []state.TopicPartition{c0, c1, v0}, empty: map[state.TopicPartition]bool{c1: true}, clickTopic: "clicks", clickParts: 2}
	rec := func(seen, applied, refitted int64, idle bool) state.PartitionProgress {
		return state.PartitionProgress{Seen: seen, Applied: applied, Refitted: refitted, Idle: idle, Swept: noTime}
	}
	swept := func(r state.PartitionProgress, at int64) state.PartitionProgress { r.Swept = at; return r }
	type recs map[state.TopicPartition]state.PartitionProgress
	tests := []struct {
		name string
		recs recs
		prev int64
		want groupTimes
	}{
		{"nothing reported", nil, noTime, unknownTimes},
		{"a non-empty partition not reported holds everything",
			recs{c0: rec(10_000, 5_000, noTime, false)}, noTime, unknownTimes},
		{"minimum over the group minus lateness; empty partition left out",
			recs{c0: rec(10_000, 5_000, noTime, false), v0: swept(rec(7_000, 4_000, noTime, false), 2_700)}, noTime, groupTimes{6_000, 4_000, 2_700, noTime, 7_000, 5_000}},
		{"idle partition left out of the watermark, not of applied or the oldest seen",
			recs{c0: rec(10_000, 5_000, noTime, false), v0: rec(3_000, 2_000, noTime, true)}, noTime, groupTimes{9_000, 2_000, noTime, noTime, 3_000, 5_000}},
		{"all idle: latest time anywhere, no lateness",
			recs{c0: rec(10_000, 5_000, noTime, true), v0: rec(12_000, 6_000, noTime, true)}, noTime, groupTimes{12_000, 5_000, noTime, noTime, 10_000, 5_000}},
		{"never backwards",
			recs{c0: rec(10_000, 5_000, noTime, false), v0: rec(7_000, 4_000, noTime, false)}, 8_000, groupTimes{8_000, 4_000, noTime, noTime, 7_000, 5_000}},
		{"applied unknown while a partition did not report it",
			recs{c0: rec(10_000, noTime, noTime, false), v0: rec(7_000, 4_000, noTime, false)}, noTime, groupTimes{6_000, noTime, noTime, noTime, 7_000, noTime}},
		{"boundary needs every click partition's refit mark, empty ones too",
			recs{c0: rec(10_000, 5_000, 3_600, false), v0: rec(7_000, 4_000, noTime, false)}, noTime, groupTimes{6_000, 4_000, noTime, noTime, 7_000, 5_000}},
		{"boundary one period after the least refit mark",
			recs{c0: rec(10_000, 5_000, 3_600, false), c1: rec(noTime, noTime, 1_800, false), v0: rec(7_000, 4_000, noTime, false)}, noTime, groupTimes{6_000, 4_000, noTime, 1_800 + 900, 7_000, 5_000}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			prog := map[string]map[int]state.PartitionProgress{}
			for tp, r := range tc.recs {
				if prog[tp.Topic] == nil {
					prog[tp.Topic] = map[int]state.PartitionProgress{}
				}
				r.Partition = tp.Partition
				prog[tp.Topic][tp.Partition] = r
			}
			got := computeGroupTimes(meta, prog, 1_000, 900, tc.prev)
			if got != tc.want {
				t.Errorf("got %+v, want %+v", got, tc.want)
			}
		})
	}
}

func TestAppliedThroughAndTicks(t *testing.T) {
	gt := func(wm, boundary int64) groupTimes {
		return groupTimes{watermark: wm, applied: noTime, swept: noTime, boundary: boundary}
	}
	tests := []struct {
		name            string
		gt              groupTimes
		idle            bool
		firstHeld, seen int64
		want            int64
	}{
		{"nothing read yet: keep the recorded claim", gt(5_000, 9_000), false, noTime, noTime, noTime},
		{"nothing held: below the latest time read", gt(5_000, 9_000), false, noTime, 4_000, 3_999},
		{"nothing held, read past the boundary cannot happen; bounded anyway", gt(5_000, 9_000), false, noTime, 9_500, 9_000},
		{"bounded by the first held event", gt(12_000, 9_000), false, 7_000, 9_500, 6_999},
		{"held event after the boundary: the boundary", gt(12_000, 9_000), false, 9_001, 9_500, 9_000},
		{"idle, nothing held: the boundary", gt(5_000, 9_000), true, noTime, 4_000, 9_000},
		{"idle, boundary unknown, nothing held: the watermark", gt(5_000, noTime), true, noTime, 4_000, 5_000},
		{"boundary unknown: everything held", gt(5_000, noTime), false, 4_000, 4_500, 3_999},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			if got := appliedThrough(tc.gt, tc.idle, tc.firstHeld, tc.seen); got != tc.want {
				t.Errorf("applied through %d, want %d", got, tc.want)
			}
		})
	}
	ticks := []struct {
		name         string
		gt           groupTimes
		sweep, refit int64
		sweepOK, ok  bool
		vacuous      bool
	}{
		{"swept through the boundary", groupTimes{2_500, 1_800, 1_800, 1_800, noTime, noTime}, 1_800, 1_800, true, true, false},
		{"refit waits for the sweep", groupTimes{2_500, 1_800, 900, 1_800, noTime, noTime}, 1_800, 900, true, true, false},
		{"no sweep before the group applied through the boundary", groupTimes{2_500, 1_700, 900, 1_800, noTime, noTime}, 0, 900, false, true, false},
		{"sweep by the watermark below the boundary", groupTimes{1_700, 1_800, 900, 1_800, noTime, noTime}, 1_700, 900, true, true, false},
		{"no conversion partition: no sweep to wait for", groupTimes{2_500, 1_900, forever, 1_800, noTime, noTime}, 1_800, 1_800, true, true, false},
		{"boundary unknown: vacuous, at the tick", groupTimes{2_500, 1_900, noTime, noTime, noTime, noTime}, 1_800, 0, true, false, true},
		{"floor, not truncation", groupTimes{-100, 5_000, forever, noTime, noTime, noTime}, -900, -900, true, true, true},
		{"applied unknown", groupTimes{2_500, noTime, 1_800, 1_800, noTime, noTime}, 0, 0, false, false, false},
	}
	for _, tc := range ticks {
		t.Run(tc.name, func(t *testing.T) {
			sw, vac, sok := tc.gt.sweepWatermark(900)
			rf, ok := tc.gt.refitThrough(900)
			if sok != tc.sweepOK || ok != tc.ok || vac != tc.vacuous || (sok && sw != tc.sweep) || (ok && rf != tc.refit) {
				t.Errorf("sweep %d %v %v, refit %d %v; want %d %v %v, %d %v", sw, vac, sok, rf, ok, tc.sweep, tc.vacuous, tc.sweepOK, tc.refit, tc.ok)
			}
		})
	}
	if k := gt(2_500, 1_800).keyWatermark(7); k != 1_800 {
		t.Errorf("key watermark %d, want the boundary", k)
	}
	if k := gt(noTime, 1_800).keyWatermark(7); k != 7 {
		t.Errorf("key watermark %d, want the fallback", k)
	}
}

// TestRefitPartition checks the owner mapping against the standard
// library's FNV-1a and against a value of the 32-bit FNV-1a test vectors:
// FNV-1a("a") = 0xe40c292c (Fowler, Noll, Vo, "FNV hash" reference test
// suite; recalled from memory, confirmed by hash/fnv here).
func TestRefitPartition(t *testing.T) {
	h := fnv.New32a()
	h.Write([]byte("a"))
	if h.Sum32() != 0xe40c292c {
		t.Fatalf("FNV-1a(a) = %#x", h.Sum32())
	}
	if got, want := refitPartition("a", 7), int(uint32(0xe40c292c)%7); got != want {
		t.Errorf("refitPartition(a, 7) = %d, want %d", got, want)
	}
	counts := make([]int, 3)
	for i := range 300 {
		counts[refitPartition("exp-"+string(rune('a'+i%26))+string(rune('a'+i/26)), 3)]++
	}
	for p, n := range counts {
		if n == 0 {
			t.Errorf("partition %d owns none of 300 experiments: %v", p, counts)
		}
	}
}

// TestHoldBackByPrefix checks that release lets through, per partition,
// the longest run of events at or before the boundary (undecodable
// messages pass), holds everything while the boundary is unknown, and
// releases everything past the cap.
func TestHoldBackByPrefix(t *testing.T) {
	tp := state.TopicPartition{Topic: "clicks", Partition: 0}
	msg := func(off, ts int64, has bool) fetched {
		return fetched{tp: tp, offset: off, hwm: 100, ts: ts, hasTS: has}
	}
	newGen := func() *genState {
		g := &genState{assigned: []state.TopicPartition{tp}, own: map[state.TopicPartition]*ownedPart{}}
		var cfg Config
		cfg.Kafka.ClickTopic = "clicks"
		for _, m := range []fetched{msg(0, 100, true), msg(1, 0, false), msg(2, 199, true), msg(3, 205, true), msg(4, 150, true), msg(5, 300, true)} {
			g.own[tp] = ensure(g.own[tp])
			p := g.own[tp]
			p.held = append(p.held, m)
			g.heldTotal++
		}
		return g
	}
	offsets := func(b *batch) []int64 {
		var out []int64
		for _, m := range b.msgs {
			out = append(out, m.offset)
		}
		return out
	}
	tests := []struct {
		name     string
		boundary int64
		cap      int
		want     []int64
	}{
		{"boundary unknown", noTime, 100, nil},
		{"prefix through the first event after the boundary", 200, 100, []int64{0, 1, 2}},
		{"boundary past everything", 1_000, 100, []int64{0, 1, 2, 3, 4, 5}},
		{"over the cap", noTime, 5, []int64{0, 1, 2, 3, 4, 5}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			g := newGen()
			g.times = unknownTimes
			g.times.boundary = tc.boundary
			var cfg Config
			cfg.Pipeline.HoldbackCap = tc.cap
			cfg.Pipeline.FlushEvents = 1
			b, overflow := g.release(cfg)
			got := offsets(b)
			if len(got) != len(tc.want) {
				t.Fatalf("released %v, want %v", got, tc.want)
			}
			for i := range got {
				if got[i] != tc.want[i] {
					t.Fatalf("released %v, want %v", got, tc.want)
				}
			}
			if overflow != (tc.cap < 6) || g.heldTotal != 6-len(got) || len(g.own[tp].held) != g.heldTotal {
				t.Errorf("overflow %v, held %d/%d", overflow, g.heldTotal, len(g.own[tp].held))
			}
		})
	}
	// Reported progress: applied through the event before the first held
	// one; idle only after the idle timeout.
	g := newGen()
	g.times = groupTimes{watermark: 500, applied: noTime, swept: noTime, boundary: 200}
	var cfg Config
	cfg.Pipeline.HoldbackCap = 100
	g.release(cfg)
	cfg.Kafka.ClickTopic = "clicks"
	cfg.Pipeline.IdleTimeout = time.Minute
	now := time.Now()
	g.own[tp].caughtUp, g.own[tp].lastRead = true, now.Add(-30*time.Second)
	rep := g.progress(cfg, now)["clicks"]
	if len(rep) != 1 || rep[0].Applied != 200 || rep[0].Idle {
		t.Errorf("progress %+v, want applied 200 (boundary), not idle", rep)
	}
	g.own[tp].lastRead = now.Add(-2 * time.Minute)
	if rep := g.progress(cfg, now)["clicks"]; !rep[0].Idle {
		t.Errorf("progress %+v, want idle", rep)
	}
}

// TestReadGate checks that a partition holding its share of the cap
// pauses its reader and that releasing its events resumes it.
func TestReadGate(t *testing.T) {
	tp := state.TopicPartition{Topic: "clicks", Partition: 0}
	var cfg Config
	cfg.Kafka.ClickTopic = "clicks"
	cfg.Pipeline.HoldbackCap = 6
	g := &genState{assigned: []state.TopicPartition{tp}, own: map[state.TopicPartition]*ownedPart{tp: {seen: noTime, gate: newReadGate(partitionHoldCap(cfg, 1))}}, times: unknownTimes}
	shut := func() bool {
		ctx, cancel := context.WithTimeout(context.Background(), 20*time.Millisecond)
		defer cancel()
		return g.own[tp].gate.wait(ctx) != nil
	}
	for off := range int64(6) {
		if shut() {
			t.Fatalf("gate shut after %d held events", off)
		}
		v, _ := json.Marshal(Click{ClickID: "k", Experiment: "e", Arm: "a", TS: streamT0 + 1_000*(off+1)})
		g.own[tp].gate.add(1) // as the reader does
		g.receive(fetched{tp: tp, offset: off, value: v, hwm: 100}, cfg, time.Now())
	}
	if !shut() {
		t.Fatal("gate open with the partition's share held")
	}
	g.times.boundary = streamT0 + 3_000
	if b, overflow := g.release(cfg); b.len() != 3 || overflow {
		t.Fatalf("released %d (overflow %v), want 3", b.len(), overflow)
	}
	if shut() {
		t.Fatal("gate still shut after the release")
	}
}

func ensure(p *ownedPart) *ownedPart {
	if p == nil {
		return &ownedPart{seen: noTime}
	}
	return p
}

func TestWithSeq(t *testing.T) {
	tests := []struct{ in, want string }{
		{`{"experiment":"x"}`, `{"seq":7,"experiment":"x"}`},
		{`{}`, `{"seq":7}`},
		{` { "a" : 1 } `, `{"seq":7, "a" : 1 }`},
	}
	for _, tc := range tests {
		got, err := withSeq([]byte(tc.in), 7)
		if err != nil || string(got) != tc.want {
			t.Errorf("withSeq(%s) = %s, %v; want %s", tc.in, got, err, tc.want)
		}
	}
	if _, err := withSeq([]byte(`[1]`), 1); err == nil {
		t.Error("withSeq accepted a JSON array")
	}
}
