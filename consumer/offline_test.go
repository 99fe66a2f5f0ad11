package consumer

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"testing/iotest"
	"time"

	"ripen/estimator"
)

var update = flag.Bool("update", false, "rewrite the golden files in testdata/events")

// rej is a rejection without its detail, for comparisons.
type rej struct {
	src    string
	line   int
	reason Reason
}

func reasons(rs []Rejection) []rej {
	out := make([]rej, len(rs))
	for i, r := range rs {
		out[i] = rej{r.Source, r.Line, r.Reason}
	}
	return out
}

// Times of the invented scenario, from the civil-date oracle in event_test.go.
var (
	day0 = civilMs(2025, 2, 10, 0, 0, 0, 0, 0) // 2025-02-10T00:00:00Z
	asOf = civilMs(2025, 2, 20, 0, 0, 0, 0, 0) // 2025-02-20T00:00:00Z
)

const hourMs = int64(time.Hour / time.Millisecond)

func ck(id, exp, arm string, ts int64) string {
	return fmt.Sprintf(`{"click_id":%q,"experiment":%q,"arm":%q,"ts":%d}`, id, exp, arm, ts)
}

func cv(id string, ts int64) string {
	return fmt.Sprintf(`{"click_id":%q,"ts":%d}`, id, ts)
}

func cvAttr(id string, ts int64, exp, arm string, clickTS int64) string {
	return fmt.Sprintf(`{"click_id":%q,"ts":%d,"experiment":%q,"arm":%q,"click_ts":%d}`, id, ts, exp, arm, clickTS)
}

func lines(ls ...string) string { return strings.Join(ls, "\n") + "\n" }

func TestBuildOfflineJoinRules(t *testing.T) {
	c1 := ck("k-1", "tea-tin", "a", day0)
	c2 := ck("k-2", "tea-tin", "b", day0+hourMs)
	tests := []struct {
		name        string
		clicks      string
		conversions string
		want        []rej
		clicksN     int
		convN       int
		self        int
		futureC     int
		futureV     int
	}{
		{name: "plain join", clicks: lines(c1, c2), conversions: lines(cv("k-1", day0+2*hourMs)),
			clicksN: 2, convN: 1},
		{name: "malformed click and conversion lines", clicks: lines(c1, `{"click_id":`, c2),
			conversions: lines(`not json`, cv("k-2", day0+2*hourMs)),
			want:        []rej{{SourceClicks, 2, ReasonMalformedJSON}, {SourceConversions, 1, ReasonMalformedJSON}},
			clicksN:     2, convN: 1},
		{name: "duplicate click keeps the first", clicks: lines(c1, ck("k-1", "tea-tin", "b", day0)),
			conversions: lines(cv("k-1", day0+hourMs)),
			want:        []rej{{SourceClicks, 2, ReasonDuplicateClick}}, clicksN: 1, convN: 1},
		{name: "unknown click", clicks: lines(c1), conversions: lines(cv("k-9", day0)),
			want: []rej{{SourceConversions, 1, ReasonUnknownClick}}, clicksN: 1},
		{name: "partial attribution is not enough", clicks: lines(c1),
			conversions: lines(`{"click_id":"k-9","ts":1739181600000,"experiment":"tea-tin","arm":"a"}`),
			want:        []rej{{SourceConversions, 1, ReasonUnknownClick}}, clicksN: 1},
		{name: "conversion of a rejected click is unknown", clicks: lines(`{"click_id":"k-1","experiment":"tea-tin","arm":"a","ts":1.5}`),
			conversions: lines(cv("k-1", day0)),
			want:        []rej{{SourceClicks, 1, ReasonBadTimestamp}, {SourceConversions, 1, ReasonUnknownClick}}},
		{name: "conversion before click", clicks: lines(c1), conversions: lines(cv("k-1", day0-1)),
			want: []rej{{SourceConversions, 1, ReasonConversionBeforeClick}}, clicksN: 1},
		{name: "delay of exactly the window is kept", clicks: lines(c1), conversions: lines(cv("k-1", day0+7*24*hourMs)),
			clicksN: 1, convN: 1},
		{name: "delay past the window", clicks: lines(c1), conversions: lines(cv("k-1", day0+7*24*hourMs+1)),
			want: []rej{{SourceConversions, 1, ReasonConversionAfterWindow}}, clicksN: 1},
		{name: "duplicate conversion keeps the first", clicks: lines(c1),
			conversions: lines(cv("k-1", day0+hourMs), "", cv("k-1", day0+2*hourMs)),
			want:        []rej{{SourceConversions, 3, ReasonDuplicateConversion}}, clicksN: 1, convN: 1},
		{name: "rejected conversion does not block a later valid one", clicks: lines(c1),
			conversions: lines(cv("k-1", day0-1), cv("k-1", day0+hourMs)),
			want:        []rej{{SourceConversions, 1, ReasonConversionBeforeClick}}, clicksN: 1, convN: 1},
		{name: "experiment mismatch", clicks: lines(c1), conversions: lines(cvAttr("k-1", day0+hourMs, "other", "a", day0)),
			want: []rej{{SourceConversions, 1, ReasonAttributionMismatch}}, clicksN: 1},
		{name: "arm mismatch", clicks: lines(c1), conversions: lines(cvAttr("k-1", day0+hourMs, "tea-tin", "b", day0)),
			want: []rej{{SourceConversions, 1, ReasonAttributionMismatch}}, clicksN: 1},
		{name: "click_ts mismatch by one ms", clicks: lines(c1), conversions: lines(cvAttr("k-1", day0+hourMs, "tea-tin", "a", day0+1)),
			want: []rej{{SourceConversions, 1, ReasonAttributionMismatch}}, clicksN: 1},
		{name: "matching attribution joins", clicks: lines(c1), conversions: lines(cvAttr("k-1", day0+hourMs, "tea-tin", "a", day0)),
			clicksN: 1, convN: 1},
		{name: "self-attributed conversion brings its click", clicks: lines(c1),
			conversions: lines(cvAttr("k-5", day0+hourMs, "tea-tin", "b", day0), cvAttr("k-5", day0+2*hourMs, "tea-tin", "b", day0)),
			want:        []rej{{SourceConversions, 2, ReasonDuplicateConversion}}, clicksN: 2, convN: 1, self: 1},
		{name: "self-attributed conversion past the window", clicks: lines(c1),
			conversions: lines(cvAttr("k-5", day0+8*24*hourMs, "tea-tin", "b", day0)),
			want:        []rej{{SourceConversions, 1, ReasonConversionAfterWindow}}, clicksN: 1},
		{name: "self-attributed conversion before its click", clicks: lines(c1),
			conversions: lines(cvAttr("k-5", day0, "tea-tin", "b", day0+1)),
			want:        []rej{{SourceConversions, 1, ReasonConversionBeforeClick}}, clicksN: 1},
		{name: "future events are ignored, not rejected", clicks: lines(c1, ck("k-3", "tea-tin", "a", asOf+1)),
			conversions: lines(cv("k-1", asOf+1), cv("k-3", asOf+2)),
			clicksN:     1, futureC: 1, futureV: 2},
		{name: "event at the as-of time counts", clicks: lines(ck("k-3", "tea-tin", "a", asOf)),
			conversions: lines(cv("k-3", asOf)), clicksN: 1, convN: 1},
		{name: "conversion of a future click is before its click", clicks: lines(ck("k-3", "tea-tin", "a", asOf+hourMs)),
			conversions: lines(cv("k-3", asOf)),
			want:        []rej{{SourceConversions, 1, ReasonConversionBeforeClick}}, futureC: 1},
		{name: "blank, whitespace and CRLF lines", clicks: "\n  \t\r\n" + c1 + "\r\n\r\n" + c2,
			conversions: "\r\n" + cv("k-2", day0+2*hourMs) + "\r\n" + `{"click_id":"k-1","ts":"bad"}`,
			want:        []rej{{SourceConversions, 3, ReasonBadTimestamp}}, clicksN: 2, convN: 1},
		{name: "byte order mark on the first line", clicks: "\xef\xbb\xbf" + c1 + "\n", conversions: "",
			clicksN: 1},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			res, err := BuildOffline(context.Background(), strings.NewReader(tt.clicks), strings.NewReader(tt.conversions), OfflineOptions{AsOf: asOf})
			if err != nil {
				t.Fatal(err)
			}
			if got := reasons(res.Rejections); !slices.Equal(got, tt.want) {
				t.Errorf("rejections %v, want %v", got, tt.want)
			}
			if res.Clicks != tt.clicksN || res.Conversions != tt.convN || res.SelfAttributed != tt.self ||
				res.FutureClicks != tt.futureC || res.FutureConversions != tt.futureV {
				t.Errorf("counts clicks %d conversions %d self %d future %d/%d, want %d %d %d %d/%d",
					res.Clicks, res.Conversions, res.SelfAttributed, res.FutureClicks, res.FutureConversions,
					tt.clicksN, tt.convN, tt.self, tt.futureC, tt.futureV)
			}
			// The arm states hold exactly the counted events, advanced to AsOf.
			var clicks, convs uint64
			for _, e := range res.Experiments {
				for _, a := range e.Arms {
					clicks += a.State.Clicks()
					convs += a.State.Conversions()
					if a.State.Watermark() != asOf {
						t.Errorf("%s/%s watermark %d, want %d", e.Name, a.Name, a.State.Watermark(), asOf)
					}
				}
			}
			if clicks != uint64(tt.clicksN) || convs != uint64(tt.convN) {
				t.Errorf("states hold %d clicks, %d conversions; want %d, %d", clicks, convs, tt.clicksN, tt.convN)
			}
		})
	}
}

func TestBuildOfflineCustomWindow(t *testing.T) {
	opts := OfflineOptions{AsOf: asOf, Layout: estimator.Layout{Window: time.Hour}}
	clicks := lines(ck("k-1", "tea-tin", "a", day0), ck("k-2", "tea-tin", "a", day0))
	convs := lines(cv("k-1", day0+hourMs), cv("k-2", day0+hourMs+1))
	res, err := BuildOffline(context.Background(), strings.NewReader(clicks), strings.NewReader(convs), opts)
	if err != nil {
		t.Fatal(err)
	}
	want := []rej{{SourceConversions, 2, ReasonConversionAfterWindow}}
	if got := reasons(res.Rejections); !slices.Equal(got, want) {
		t.Errorf("rejections %v, want %v", got, want)
	}
	s := res.Arm("tea-tin", "a")
	if s == nil || s.Layout().Window != time.Hour {
		t.Fatalf("arm state %v does not use the 1h window", s)
	}
}

func TestBuildOfflineLongLines(t *testing.T) {
	// pad returns a click line of exactly n bytes (an unknown field pads it).
	pad := func(id string, n int) string {
		head := `{"pad":"`
		tail := `","click_id":"` + id + `","experiment":"tea-tin","arm":"a","ts":1739178000000}`
		return head + strings.Repeat("x", n-len(head)-len(tail)) + tail
	}
	tests := []struct {
		name   string
		max    int
		clicks string
		want   []rej
		n      int
	}{
		{name: "longer than the read buffer but within the limit", clicks: lines(pad("k-1", 200_000), ck("k-2", "tea-tin", "a", day0)), n: 2},
		{name: "exactly the default limit", clicks: lines(pad("k-1", DefaultMaxLineBytes)), n: 1},
		{name: "exactly the limit with CRLF", clicks: pad("k-1", DefaultMaxLineBytes) + "\r\n", n: 1},
		{name: "one byte over the default limit", clicks: lines(pad("k-1", DefaultMaxLineBytes+1), ck("k-2", "tea-tin", "a", day0)),
			want: []rej{{SourceClicks, 1, ReasonLineTooLong}}, n: 1},
		{name: "far over the limit, unterminated", clicks: lines(ck("k-2", "tea-tin", "a", day0)) + pad("k-1", 3*DefaultMaxLineBytes),
			want: []rej{{SourceClicks, 2, ReasonLineTooLong}}, n: 1},
		{name: "small limit", max: 100, clicks: lines(pad("k-1", 101), pad("k-2", 100), "", pad("k-3", 150)),
			want: []rej{{SourceClicks, 1, ReasonLineTooLong}, {SourceClicks, 4, ReasonLineTooLong}}, n: 1},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			opts := OfflineOptions{AsOf: asOf, MaxLineBytes: tt.max}
			// OneByteReader-style short reads would be too slow for MiB
			// lines; HalfReader still splits every read.
			res, err := BuildOffline(context.Background(), iotest.HalfReader(strings.NewReader(tt.clicks)), strings.NewReader(""), opts)
			if err != nil {
				t.Fatal(err)
			}
			if got := reasons(res.Rejections); !slices.Equal(got, tt.want) {
				t.Errorf("rejections %v, want %v", got, tt.want)
			}
			if res.Clicks != tt.n {
				t.Errorf("clicks %d, want %d", res.Clicks, tt.n)
			}
		})
	}
}

func TestBuildOfflineStrict(t *testing.T) {
	clicks := lines(ck("k-1", "tea-tin", "a", day0))
	convs := lines(cv("k-1", day0+hourMs), "", cv("k-7", day0+hourMs), `{`)
	_, err := BuildOffline(context.Background(), strings.NewReader(clicks), strings.NewReader(convs), OfflineOptions{AsOf: asOf, Strict: true})
	if err == nil {
		t.Fatal("strict build accepted an unknown click")
	}
	if !strings.Contains(err.Error(), "conversions line 3") || !strings.Contains(err.Error(), "unknown_click") {
		t.Errorf("error %q does not name source, line and reason", err)
	}
	assertReason(t, err, ReasonUnknownClick)

	_, err = BuildOffline(context.Background(), strings.NewReader(lines(`{"click_id":"k"}`)), strings.NewReader(""), OfflineOptions{AsOf: asOf, Strict: true})
	if err == nil || !strings.Contains(err.Error(), "clicks line 1") {
		t.Errorf("strict click error = %v", err)
	}
	assertReason(t, err, ReasonMissingField)
}

func TestBuildOfflineErrors(t *testing.T) {
	ctx := context.Background()
	empty := func() io.Reader { return strings.NewReader("") }
	t.Run("invalid options", func(t *testing.T) {
		for _, o := range []OfflineOptions{
			{},
			{AsOf: 1_739_178_000}, // seconds, not ms
			{AsOf: asOf, Layout: estimator.Layout{Window: time.Second}},
			{AsOf: asOf, MaxLineBytes: -1},
		} {
			if err := o.Validate(); err == nil {
				t.Errorf("Validate(%+v) = nil", o)
			}
			if _, err := BuildOffline(ctx, empty(), empty(), o); err == nil {
				t.Errorf("BuildOffline(%+v) accepted invalid options", o)
			}
		}
		if err := (OfflineOptions{AsOf: asOf}).Validate(); err != nil {
			t.Errorf("defaults invalid: %v", err)
		}
	})
	t.Run("read error", func(t *testing.T) {
		boom := errors.New("disk on fire")
		r := io.MultiReader(strings.NewReader(lines(ck("k-1", "tea-tin", "a", day0))), iotest.ErrReader(boom))
		_, err := BuildOffline(ctx, empty(), r, OfflineOptions{AsOf: asOf})
		if !errors.Is(err, boom) || !strings.Contains(err.Error(), "conversions") {
			t.Errorf("error %v does not wrap the read error", err)
		}
	})
	t.Run("cancelled context", func(t *testing.T) {
		cctx, cancel := context.WithCancel(ctx)
		cancel()
		_, err := BuildOffline(cctx, strings.NewReader(lines(ck("k-1", "tea-tin", "a", day0))), empty(), OfflineOptions{AsOf: asOf})
		if !errors.Is(err, context.Canceled) {
			t.Errorf("error %v, want context.Canceled", err)
		}
	})
}

func TestBuildOfflineSortedOutput(t *testing.T) {
	var b strings.Builder
	names := []struct{ exp, arm string }{{"zebra-tile", "b"}, {"apricot", "z"}, {"zebra-tile", "a"}, {"apricot", "m"}, {"mint", "only"}, {"apricot", "a"}}
	for i, n := range names {
		b.WriteString(ck(fmt.Sprintf("k-%d", i), n.exp, n.arm, day0) + "\n")
	}
	res, err := BuildOffline(context.Background(), strings.NewReader(b.String()), strings.NewReader(""), OfflineOptions{AsOf: asOf})
	if err != nil {
		t.Fatal(err)
	}
	var got []string
	for _, e := range res.Experiments {
		for _, a := range e.Arms {
			got = append(got, e.Name+"/"+a.Name)
			if res.Arm(e.Name, a.Name) != a.State {
				t.Errorf("Arm(%q, %q) does not find its state", e.Name, a.Name)
			}
		}
	}
	want := []string{"apricot/a", "apricot/m", "apricot/z", "mint/only", "zebra-tile/a", "zebra-tile/b"}
	if !slices.Equal(got, want) {
		t.Errorf("order %v, want %v", got, want)
	}
	if res.Arm("apricot", "b") != nil || res.Arm("nope", "a") != nil {
		t.Error("Arm found a state that does not exist")
	}
}

// TestBuildOfflineFixture runs the join on the fixtures in testdata/events
// (an invented tea shop's checkout and gift-wrap experiments) and compares
// the rejections with fixture.golden; run with -update to rewrite it.
func TestBuildOfflineFixture(t *testing.T) {
	dir := filepath.Join("..", "testdata", "events")
	open := func(name string) io.Reader {
		b, err := os.ReadFile(filepath.Join(dir, name))
		if err != nil {
			t.Fatal(err)
		}
		return bytes.NewReader(b)
	}
	res, err := BuildOffline(context.Background(), open("clicks.jsonl"), open("conversions.jsonl"), OfflineOptions{AsOf: asOf})
	if err != nil {
		t.Fatal(err)
	}

	// Independent of the golden file: the reasons and line numbers worked
	// out by hand from the fixtures.
	want := []rej{
		{SourceClicks, 5, ReasonDuplicateClick},
		{SourceClicks, 6, ReasonBadTimestamp},
		{SourceClicks, 7, ReasonMalformedJSON},
		{SourceClicks, 10, ReasonAbsurdTimestamp},
		{SourceClicks, 11, ReasonEmptyField},
		{SourceClicks, 13, ReasonInvalidText},
		{SourceClicks, 16, ReasonDuplicateField},
		{SourceConversions, 2, ReasonDuplicateConversion},
		{SourceConversions, 3, ReasonUnknownClick},
		{SourceConversions, 4, ReasonConversionBeforeClick},
		{SourceConversions, 6, ReasonConversionAfterWindow},
		{SourceConversions, 7, ReasonAttributionMismatch},
		{SourceConversions, 9, ReasonConversionBeforeClick},
		{SourceConversions, 13, ReasonAttributionMismatch},
		{SourceConversions, 14, ReasonMalformedJSON},
		{SourceConversions, 16, ReasonUnknownClick},
	}
	if got := reasons(res.Rejections); !slices.Equal(got, want) {
		t.Errorf("rejections\n got %v\nwant %v", got, want)
	}
	type arm struct {
		clicks, convs, maturedClicks, maturedConvs uint64
		delaySum                                   float64 // seconds
	}
	wantArms := map[string]arm{
		// k-001 (converted after 1.5 h) and k-009 (after exactly 7 days)
		// are older than the 7-day window at the as-of time; k-011 is not.
		"checkout-copy/control": {3, 2, 2, 2, 5400 + 7*86400},
		// k-002 at 08:05:00.5Z and k-003 at 09:00Z, both matured.
		"checkout-copy/short-form": {2, 0, 2, 0, 0},
		// k-006 (delay 0), self-attributed k-777 (2 h), k-012 (6 h).
		"gift-wrap-banner/red": {3, 3, 0, 0, 2*3600 + 6*3600},
	}
	seen := 0
	for _, e := range res.Experiments {
		for _, a := range e.Arms {
			name := e.Name + "/" + a.Name
			w, ok := wantArms[name]
			if !ok {
				t.Errorf("unexpected arm %s", name)
				continue
			}
			seen++
			mc, mv := a.State.Matured()
			fd := a.State.FitData()
			got := arm{a.State.Clicks(), a.State.Conversions(), mc, mv, fd.Delays.Sum}
			if got != w {
				t.Errorf("%s: got %+v, want %+v", name, got, w)
			}
			if fd.TotalClicks() != float64(w.clicks) || fd.Delays.Count != float64(w.convs) {
				t.Errorf("%s: fit data has %v clicks, %v delays", name, fd.TotalClicks(), fd.Delays.Count)
			}
		}
	}
	if seen != len(wantArms) {
		t.Errorf("found %d of %d arms", seen, len(wantArms))
	}
	if res.Clicks != 8 || res.Conversions != 5 || res.SelfAttributed != 1 || res.FutureClicks != 1 || res.FutureConversions != 1 {
		t.Errorf("counts %+v", res)
	}

	var g strings.Builder
	for _, r := range res.Rejections {
		fmt.Fprintf(&g, "%s:%d\t%s\t%s\n", r.Source, r.Line, r.Reason, r.Detail)
	}
	fmt.Fprintf(&g, "clicks=%d conversions=%d self_attributed=%d future_clicks=%d future_conversions=%d\n",
		res.Clicks, res.Conversions, res.SelfAttributed, res.FutureClicks, res.FutureConversions)
	golden := filepath.Join(dir, "fixture.golden")
	if *update {
		if err := os.WriteFile(golden, []byte(g.String()), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	wantGolden, err := os.ReadFile(golden)
	if err != nil {
		t.Fatalf("%v (run with -update to create it)", err)
	}
	if g.String() != string(wantGolden) {
		t.Errorf("rejections differ from %s (run with -update after checking):\n got:\n%s\nwant:\n%s", golden, g.String(), wantGolden)
	}
}

func BenchmarkBuildOffline(b *testing.B) {
	var clicks, convs bytes.Buffer
	for i := range 20_000 {
		ts := day0 + int64(i)*30_000
		clicks.WriteString(ck(fmt.Sprintf("k-%06d", i), "tea-tin", []string{"a", "b"}[i%2], ts) + "\n")
		if i%10 == 0 {
			convs.WriteString(cv(fmt.Sprintf("k-%06d", i), ts+hourMs) + "\n")
		}
	}
	b.SetBytes(int64(clicks.Len() + convs.Len()))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := BuildOffline(context.Background(), bytes.NewReader(clicks.Bytes()), bytes.NewReader(convs.Bytes()), OfflineOptions{AsOf: asOf}); err != nil {
			b.Fatal(err)
		}
	}
}
