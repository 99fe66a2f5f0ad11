package state

import (
	"errors"
	"testing"
	"time"

	"ripen/state/redistest"
)

// TestClusterClient runs the whole API through a cluster client against a
// one-node cluster, which refuses any command or script whose keys span
// slots (CROSSSLOT), and checks the result against the estimator.
func TestClusterClient(t *testing.T) {
	srv := redistest.StartCluster(t)
	s, err := New(srv.ClusterClient(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	ctx := testCtx(t)
	steps := singleInstance(scenario(31, 600, 3), 50)
	applySteps(t, ctx, s, steps, 1)
	for _, arm := range []string{"red", "blue", "green"} {
		if _, err := s.Compact(ctx, "exp-a", arm); err != nil {
			t.Fatalf("compact %s: %v", arm, err)
		}
	}
	assertMatches(t, ctx, s, reference(testLayout, steps))
	if _, err := s.Apply(ctx, buildDeltas(testLayout, steps[0].wm, 0, steps[0].events)[0]); !errors.Is(err, ErrFenced) {
		t.Fatalf("old generation on the cluster: %v, want fenced", err)
	}
	if seq, err := s.SaveAllocation(ctx, "exp-a", []byte(`{}`)); err != nil || seq != 1 {
		t.Fatalf("save allocation: %d %v", seq, err)
	}
	if err := s.SetResume(ctx, "clicks", 0, 9); err != nil {
		t.Fatal(err)
	}
	res, err := s.LookupConversions(ctx, []ConversionLookup{
		{ClickID: "q1", Origin: "convs/0/1", Topic: "convs", Partition: 0, Deadline: t0},
		{ClickID: "q2", Origin: "convs/0/2", Topic: "convs", Partition: 0, Deadline: t0},
	})
	if err != nil || res[0].Status != LookupParked || res[1].Status != LookupParked {
		t.Fatalf("lookups: %+v %v", res, err)
	}
	orphans, err := s.PutClicks(ctx, []ClickRecord{
		{ClickID: "q1", Experiment: "exp-a", Arm: "red", TS: t0, Window: time.Hour},
		{ClickID: "q3", Experiment: "exp-a", Arm: "red", TS: t0, Window: time.Hour},
	})
	if err != nil || len(orphans) != 1 || orphans[0].ClickID != "q1" {
		t.Fatalf("put clicks: %+v %v", orphans, err)
	}
	due, err := s.DueOrphans(ctx, "convs", 0, t0, "test")
	if err != nil || len(due) != 1 || due[0].ClickID != "q2" {
		t.Fatalf("due orphans: %+v %v", due, err)
	}
	exps, err := s.Experiments(ctx)
	if err != nil || len(exps) != 2 {
		t.Fatalf("experiments %v %v", exps, err)
	}
}
