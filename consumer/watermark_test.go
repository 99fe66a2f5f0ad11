package consumer

import (
	"testing"

	"ripen/state"
)

func TestWatermarks(t *testing.T) {
	a := state.TopicPartition{Topic: "clicks", Partition: 0}
	b := state.TopicPartition{Topic: "conversions", Partition: 0}
	type obs struct {
		tp     state.TopicPartition
		ts     int64
		caught bool
	}
	tests := []struct {
		name string
		idle []state.TopicPartition
		obs  []obs
		want int64
	}{
		{"nothing seen", nil, nil, noTime},
		{"one partition not delivered yet holds it", nil, []obs{{a, 10_000, false}}, noTime},
		{"minimum over partitions minus lateness", nil, []obs{{a, 10_000, false}, {b, 7_000, false}}, 7_000 - 1_000},
		{"empty partition does not hold it", []state.TopicPartition{b}, []obs{{a, 10_000, false}}, 9_000},
		{"caught-up partition does not hold it", nil, []obs{{a, 10_000, false}, {b, 3_000, true}}, 9_000},
		{"all caught up: latest anywhere", nil, []obs{{a, 10_000, true}, {b, 12_000, true}}, 11_000},
		{"never backwards", nil, []obs{{a, 10_000, false}, {b, 12_000, false}, {b, 13_000, false}, {a, 9_000, false}}, 9_000},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			w := newWatermarks(1_000, []state.TopicPartition{a, b})
			for _, tp := range tc.idle {
				w.idle(tp)
			}
			var got int64 = noTime
			for _, o := range tc.obs {
				w.observe(o.tp, o.ts, o.caught)
				got = w.advance()
			}
			if len(tc.obs) == 0 {
				got = w.advance()
			}
			if got != tc.want {
				t.Errorf("watermark %d, want %d (%s)", got, tc.want, w)
			}
		})
	}
}

func TestTickerFiresOncePerBoundary(t *testing.T) {
	tk := ticker{periodMs: 100, last: noTime}
	var fired []int64
	for _, wm := range []int64{noTime, 50, 99, 100, 150, 420, 420, 399, 500} {
		if at, ok := tk.due(wm); ok {
			fired = append(fired, at)
		}
	}
	want := []int64{0, 100, 400, 500}
	if len(fired) != len(want) {
		t.Fatalf("fired at %v, want %v", fired, want)
	}
	for i := range want {
		if fired[i] != want[i] {
			t.Fatalf("fired at %v, want %v", fired, want)
		}
	}
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
