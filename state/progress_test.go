package state

import (
	"reflect"
	"testing"
)

// TestProgress checks that reported times only move forward, that the
// idle flag follows the newest generation, and that refit marks are kept
// per click partition.
func TestProgress(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	steps := []struct {
		gen   int32
		parts []PartitionProgress
	}{
		{3, []PartitionProgress{{Partition: 0, Seen: t0 + 500, Applied: t0 + 100, Idle: false, Swept: NoTime}, {Partition: 2, Seen: t0, Applied: NoTime, Idle: true, Swept: t0 - 10}}},
		// A stale report (zombie of generation 2) lowers nothing and does
		// not change the idle flag.
		{2, []PartitionProgress{{Partition: 0, Seen: t0 + 50, Applied: t0 + 40, Idle: true, Swept: NoTime}, {Partition: 2, Seen: NoTime, Applied: NoTime, Swept: t0 - 20}}},
		// The owner moves on; NoTime leaves a time alone.
		{3, []PartitionProgress{{Partition: 0, Seen: t0 + 900, Applied: NoTime, Idle: true, Swept: t0 + 5}}},
	}
	for _, st := range steps {
		if err := s.ReportProgress(ctx, "clicks", st.gen, st.parts); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.MarkRefitted(ctx, "clicks", 0, t0+60); err != nil {
		t.Fatal(err)
	}
	if err := s.MarkRefitted(ctx, "clicks", 0, t0+30); err != nil { // late: ignored
		t.Fatal(err)
	}
	got, err := s.Progress(ctx, "clicks", "convs")
	if err != nil {
		t.Fatal(err)
	}
	want := map[string]map[int]PartitionProgress{
		"clicks": {
			0: {Partition: 0, Seen: t0 + 900, Applied: t0 + 100, Idle: true, Swept: t0 + 5, Refitted: t0 + 60, Generation: 3},
			2: {Partition: 2, Seen: t0, Applied: NoTime, Idle: true, Swept: t0 - 10, Refitted: NoTime, Generation: 3},
		},
		"convs": {},
	}
	if !reflect.DeepEqual(got, want) {
		t.Fatalf("progress\n got  %+v\n want %+v", got, want)
	}
}
