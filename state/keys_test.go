package state

import (
	"context"
	"regexp"
	"testing"
	"time"

	"ripen/state/redistest"
)

// TestCRC16 checks the hash against the test vector of the Redis Cluster
// Specification ("Keys distribution model", CRC16 reference: XMODEM,
// "123456789" -> 0x31C3).
func TestCRC16(t *testing.T) {
	if got := redistest.CRC16([]byte("123456789")); got != 0x31C3 {
		t.Fatalf("redistest.CRC16(123456789) = %#04x, want 0x31c3", got)
	}
	// Hash tags per the same section: {user1000}.following and
	// {user1000}.followers hash to the same slot; foo{}{bar} hashes whole.
	if redistest.KeySlot("{user1000}.following") != redistest.KeySlot("{user1000}.followers") {
		t.Errorf("hash tag ignored")
	}
	if redistest.KeySlot("foo{}{bar}") != int(redistest.CRC16([]byte("foo{}{bar}"))&16383) {
		t.Errorf("empty hash tag not hashed whole")
	}
}

// TestKeysHashTags runs every kind of write and checks that each key but
// the discovery set carries a hash tag of the right kind, and that all keys
// of one experiment, one click and one partition share a slot.
func TestKeysHashTags(t *testing.T) {
	s, rdb, _ := newStore(t, Options{Prefix: "rp"})
	ctx := testCtx(t)
	steps := singleInstance(scenario(5, 300, 2), 50)
	applySteps(t, ctx, s, steps, 1)
	for _, exp := range []string{"exp-a", "exp-b"} {
		if _, err := s.SaveAllocation(ctx, exp, []byte(`{"w":[0.5,0.5]}`)); err != nil {
			t.Fatal(err)
		}
		if _, err := s.Compact(ctx, exp, "x"); err != nil && exp == "exp-b" {
			t.Fatal(err)
		}
	}
	if err := s.SetResume(ctx, "clicks", 1, 42); err != nil {
		t.Fatal(err)
	}
	if _, err := s.PutClicks(ctx, []ClickRecord{{ClickID: "c1", Experiment: "exp-a", Arm: "red", TS: t0, Window: time.Hour}}); err != nil {
		t.Fatal(err)
	}
	if _, err := s.LookupConversions(ctx, []ConversionLookup{{ClickID: "nope", Origin: "convs/0/1", Topic: "convs", Partition: 0, Deadline: t0}}); err != nil {
		t.Fatal(err)
	}

	keys, err := rdb.Keys(context.Background(), "*").Result()
	if err != nil {
		t.Fatal(err)
	}
	tagged := regexp.MustCompile(`^rp:\{([xiog])(?::([^{}]+))?\}:(.+)$`)
	suffix := map[string]*regexp.Regexp{
		"x": regexp.MustCompile(`^(meta|arms|off|a:.+|cv:.+)$`),
		"i": regexp.MustCompile(`^(meta|dict|g|o|-?\d+:(\d+|f))$`),
		"o": regexp.MustCompile(`^due$`),
		"g": regexp.MustCompile(`^resume$`),
	}
	slots := map[string]int{}
	kinds := map[string]int{}
	for _, k := range keys {
		if k == "rp:experiments" {
			kinds["discovery"]++
			continue
		}
		m := tagged.FindStringSubmatch(k)
		if m == nil {
			t.Errorf("key %q has no hash tag of a known kind", k)
			continue
		}
		if !suffix[m[1]].MatchString(m[3]) {
			t.Errorf("key %q: unexpected suffix %q for kind %s", k, m[3], m[1])
		}
		kinds[m[1]]++
		group := m[1]
		if m[2] != "" {
			group += ":" + m[2]
		}
		slot := redistest.KeySlot(k)
		if prev, ok := slots[group]; ok && prev != slot {
			t.Errorf("key %q in slot %d, other keys of %s in %d", k, slot, group, prev)
		}
		slots[group] = slot
		if want := int(redistest.CRC16([]byte(group)) & 16383); slot != want {
			t.Errorf("key %q hashes to %d, its tag %q to %d", k, slot, group, want)
		}
	}
	for _, kind := range []string{"discovery", "x", "i", "o", "g"} {
		if kinds[kind] == 0 {
			t.Errorf("no key of kind %s written", kind)
		}
	}
	// The markers exist (kind x with cv:) and are in the experiment slot.
	if n := len(keys); n < 20 {
		t.Errorf("only %d keys written", n)
	}
	t.Logf("%d keys in %d hash-tag groups", len(keys), len(slots))
}
