package state

import (
	"errors"
	"testing"
)

func TestLivePrefixPointer(t *testing.T) {
	root, rdb, _ := newStore(t, Options{Prefix: "shop"})
	ctx := testCtx(t)
	got, err := root.LivePrefix(ctx)
	if err != nil || got != "shop" {
		t.Fatalf("without a pointer: %q, %v; want the root", got, err)
	}
	if err := root.SetLivePrefix(ctx, "shop.r42"); err != nil {
		t.Fatal(err)
	}
	if v := rdb.Get(ctx, "shop:live").Val(); v != "shop.r42" {
		t.Fatalf("stored pointer %q, want shop.r42", v)
	}
	if got, err := root.LivePrefix(ctx); err != nil || got != "shop.r42" {
		t.Fatalf("after SetLivePrefix: %q, %v", got, err)
	}
	for _, bad := range []string{"", "a{b", "a b"} {
		t.Run("refuses "+bad, func(t *testing.T) {
			if err := root.SetLivePrefix(ctx, bad); !errors.Is(err, ErrInvalid) {
				t.Errorf("SetLivePrefix(%q) = %v, want ErrInvalid", bad, err)
			}
			if _, err := root.WithPrefix(bad); !errors.Is(err, ErrInvalid) {
				t.Errorf("WithPrefix(%q) = %v, want ErrInvalid", bad, err)
			}
		})
	}
	// A pointer written by hand with a broken name is an error, not a
	// silent fall-back to the root.
	rdb.Set(ctx, "shop:live", "x{y}", 0)
	if _, err := root.LivePrefix(ctx); !errors.Is(err, ErrInvalid) {
		t.Errorf("broken pointer: %v, want ErrInvalid", err)
	}
}

func TestRaiseAllocationSeq(t *testing.T) {
	root, _, _ := newStore(t, Options{Prefix: "seqs"})
	ctx := testCtx(t)
	next, err := root.WithPrefix("seqs.r1")
	if err != nil {
		t.Fatal(err)
	}
	if empty, err := next.Empty(ctx); err != nil || !empty {
		t.Fatalf("fresh prefix empty = %v, %v", empty, err)
	}
	for range 3 {
		if _, err := root.SaveAllocation(ctx, "bakery", []byte(`{"w":1}`)); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := next.SaveAllocation(ctx, "bakery", []byte(`{"w":2}`)); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		name       string
		exp        string
		floor, res int64
	}{
		{"raises", "bakery", 3, 3},
		{"never lowers", "bakery", 1, 3},
		{"unknown experiment", "cycles", 7, 7},
		{"zero floor", "shoes", 0, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			got, err := next.RaiseAllocationSeq(ctx, tc.exp, tc.floor)
			if err != nil || got != tc.res {
				t.Fatalf("RaiseAllocationSeq(%s, %d) = %d, %v; want %d", tc.exp, tc.floor, got, err, tc.res)
			}
			if seq, err := next.AllocationSeq(ctx, tc.exp); err != nil || seq != tc.res {
				t.Fatalf("AllocationSeq = %d, %v; want %d", seq, err, tc.res)
			}
		})
	}
	// The next allocation follows the raised number; the stored one was
	// kept meanwhile.
	seq, body, err := next.LatestAllocation(ctx, "bakery")
	if err != nil || seq != 3 || string(body) != `{"w":2}` {
		t.Fatalf("latest after raise: %d %s %v", seq, body, err)
	}
	if seq, err := next.SaveAllocation(ctx, "bakery", []byte(`{"w":3}`)); err != nil || seq != 4 {
		t.Fatalf("save after raise: %d, %v; want 4", seq, err)
	}
	if seq, err := next.SaveAllocation(ctx, "cycles", []byte(`{"w":3}`)); err != nil || seq != 8 {
		t.Fatalf("first save of a raised experiment: %d, %v; want 8", seq, err)
	}
	if _, err := next.RaiseAllocationSeq(ctx, "bakery", -1); !errors.Is(err, ErrInvalid) {
		t.Errorf("negative floor: %v", err)
	}
	if empty, err := next.Empty(ctx); err != nil || empty {
		t.Errorf("used prefix empty = %v, %v", empty, err)
	}
}
