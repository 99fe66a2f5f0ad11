package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/alicebob/miniredis/v2"
	"github.com/redis/go-redis/v9"

	"ripen/consumer"
	"ripen/estimator"
	"ripen/state"
	"ripen/state/redistest"
)

// reportT0 is the first click of the report tests: 2031-02-03T00:00:00Z.
var reportT0 = time.Date(2031, 2, 3, 0, 0, 0, 0, time.UTC).UnixMilli()

// reportLayout is the layout of the report tests: a two-day window.
var reportLayout = estimator.Layout{Window: 48 * time.Hour}.WithDefaults()

// yarnArm is one arm of the invented test experiment (Fernhollow Yarns
// testing two product photos): every every-th click converts, delay later.
type yarnArm struct {
	name  string
	every int
	delay time.Duration
}

var yarnArms = []yarnArm{{"skein-closeup", 5, 5 * time.Hour}, {"knitted-scarf", 7, 12 * time.Hour}}

// yarnStates spreads n clicks per arm evenly over span, ending at asOf,
// and returns the states at asOf with the conversions seen by then.
func yarnStates(n int, span time.Duration, asOf int64) map[string]*estimator.ArmState {
	out := map[string]*estimator.ArmState{}
	for _, a := range yarnArms {
		st := estimator.NewArmState(reportLayout)
		start := asOf - span.Milliseconds()
		st.Advance(start)
		for i := range n {
			ct := start + int64(i)*span.Milliseconds()/int64(n)
			st.AddClicks(ct, 1)
			if cv := ct + a.delay.Milliseconds(); i%a.every == 0 && cv <= asOf {
				st.AddConversion(ct, cv)
			}
		}
		st.Advance(asOf)
		out[a.name] = st
	}
	return out
}

// reportStores are the stores `ripen report` is tested against.
func reportStores(t *testing.T) map[string]func(t *testing.T) string {
	return map[string]func(t *testing.T) string{
		"redis-server": func(t *testing.T) string {
			srv := redistest.Start(t)
			return "redis://" + srv.Client().Options().Addr + "/0"
		},
		"embedded": func(t *testing.T) string {
			m := miniredis.RunT(t)
			return "redis://" + m.Addr() + "/0"
		},
	}
}

func TestReportCommand(t *testing.T) {
	const id, prefix = "fernhollow-photos", "rtest"
	asOf := reportT0 + (4 * 24 * time.Hour).Milliseconds()
	states := yarnStates(3000, 4*24*time.Hour, asOf)
	snap := &state.Snapshot{Format: state.SnapshotFormat, Experiments: []state.ExperimentSnapshot{{ID: id, Layout: &reportLayout, Watermark: asOf}}}
	for _, a := range yarnArms {
		snap.Experiments[0].Arms = append(snap.Experiments[0].Arms, state.ArmRecord{Arm: a.name, State: states[a.name].Snapshot()})
	}
	// A history of three publications, evaluated by the estimator on the
	// states at three times.
	var history []consumer.Allocation
	for i, h := range []int64{24, 48, 96} {
		at := reportT0 + h*3600*1000
		in := estimator.ExperimentInput{Experiment: id, AsOf: at, Fit: estimator.FitOptions{Family: estimator.FamilyExponential}, Allocation: estimator.DefaultAllocationOptions()}
		for _, a := range yarnArms {
			in.Arms = append(in.Arms, estimator.ArmData{Arm: a.name, State: yarnStates(3000*int(h)/96, time.Duration(h)*time.Hour, at)[a.name]})
		}
		rep, err := estimator.EvaluateExperiment(in)
		if err != nil {
			t.Fatal(err)
		}
		history = append(history, consumer.Allocation{Seq: int64(i + 1), ExperimentReport: rep})
	}
	for name, start := range reportStores(t) {
		t.Run(name, func(t *testing.T) {
			url := start(t)
			ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
			defer cancel()
			rdb := redis.NewClient(mustParseURL(t, url))
			defer rdb.Close()
			store, err := state.New(rdb, state.Options{Prefix: prefix})
			if err != nil {
				t.Fatal(err)
			}
			run := func(args ...string) (string, error) {
				cmd := newReportCmd()
				var out bytes.Buffer
				cmd.SetOut(&out)
				cmd.SetErr(&out)
				cmd.SetArgs(args)
				err := cmd.ExecuteContext(ctx)
				return out.String(), err
			}
			dir := filepath.Join(t.TempDir(), "out")
			args := []string{"--experiment", id, "--redis", url, "--prefix", prefix, "--out", dir}

			var ee *exitError
			if _, err := run(args...); !errors.As(err, &ee) || !strings.Contains(err.Error(), "not found") {
				t.Fatalf("report of a missing experiment = %v, want a not-found exit error", err)
			}
			if err := store.Import(ctx, snap); err != nil {
				t.Fatal(err)
			}
			for _, a := range history {
				b, err := json.Marshal(a)
				if err != nil {
					t.Fatal(err)
				}
				if err := store.AppendHistory(ctx, id, b); err != nil {
					t.Fatal(err)
				}
			}
			out, err := run(args...)
			if err != nil {
				t.Fatalf("report: %v\n%s", err, out)
			}
			if !strings.Contains(out, "3 allocations, 2 arms") {
				t.Errorf("output %q: want the counts", out)
			}
			html, err := os.ReadFile(filepath.Join(dir, "index.html"))
			if err != nil {
				t.Fatal(err)
			}
			for _, want := range []string{`"id":"traffic"`, `"id":"pbest"`, `"id":"cvr"`, `"id":"delay-cdf"`, `"id":"delay-model"`, "skein-closeup", "knitted-scarf"} {
				if !bytes.Contains(html, []byte(want)) {
					t.Errorf("report lacks %s", want)
				}
			}
			csv, err := os.ReadFile(filepath.Join(dir, "allocations.csv"))
			if err != nil {
				t.Fatal(err)
			}
			if n := bytes.Count(csv, []byte("\n")); n != 1+3*2 {
				t.Errorf("allocations.csv has %d lines, want a header and one per arm and allocation", n)
			}
		})
	}
}

func mustParseURL(t *testing.T, url string) *redis.Options {
	t.Helper()
	o, err := redis.ParseURL(url)
	if err != nil {
		t.Fatal(err)
	}
	return o
}
