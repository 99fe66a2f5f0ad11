package state

import (
	"errors"
	"fmt"
	"testing"
)

func TestHistoryKeepsNewestInOrder(t *testing.T) {
	s, rdb, _ := newStore(t, Options{Prefix: "hist"})
	ctx := testCtx(t)
	for _, tc := range []struct {
		name    string
		appends int
	}{
		{"empty", 0},
		{"one", 1},
		{"below the cap", 40},
		{"at the cap", HistoryLength},
		{"past the cap", HistoryLength + 37},
	} {
		t.Run(tc.name, func(t *testing.T) {
			exp := "hist-" + tc.name
			// The model: a plain slice of which the newest HistoryLength
			// entries are kept (LTRIM key -N -1 keeps the last N elements of
			// the list, per the Redis command reference).
			var want []string
			for i := range tc.appends {
				msg := fmt.Sprintf(`{"seq":%d}`, i+1)
				if err := s.AppendHistory(ctx, exp, []byte(msg)); err != nil {
					t.Fatalf("append %d: %v", i, err)
				}
				want = append(want, msg)
			}
			if len(want) > HistoryLength {
				want = want[len(want)-HistoryLength:]
			}
			got, err := s.History(ctx, exp)
			if err != nil {
				t.Fatal(err)
			}
			if len(got) != len(want) {
				t.Fatalf("history has %d entries, want %d", len(got), len(want))
			}
			for i := range want {
				if string(got[i]) != want[i] {
					t.Fatalf("entry %d = %s, want %s", i, got[i], want[i])
				}
			}
			if tc.appends > 0 {
				n, err := rdb.LLen(ctx, "hist:{x:"+exp+"}:hist").Result()
				if err != nil || int(n) != len(want) {
					t.Fatalf("list key holds %d (%v), want %d under the experiment's hash tag", n, err, len(want))
				}
			}
		})
	}
}

func TestHistoryRejectsBadInput(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	for _, tc := range []struct {
		name, exp string
		msg       []byte
	}{
		{"empty id", "", []byte(`{}`)},
		{"brace in id", "a}b", []byte(`{}`)},
		{"empty message", "ok", nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			err := s.AppendHistory(ctx, tc.exp, tc.msg)
			if !errors.Is(err, ErrInvalid) || IsRetriable(err) {
				t.Fatalf("AppendHistory = %v, want a permanent ErrInvalid", err)
			}
		})
	}
	if _, err := s.History(ctx, "a{b"); !errors.Is(err, ErrInvalid) {
		t.Fatalf("History with a brace = %v, want ErrInvalid", err)
	}
}
