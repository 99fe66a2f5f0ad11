package redistest

import (
	"context"
	"fmt"
	"net"
	"slices"
	"strings"
	"testing"
	"time"
)

// TestCluster3CRC16CheckValue checks the checksum against its published
// check value: CRC-16/XMODEM of the nine bytes "123456789" is 0x31C3
// (Redis Cluster specification, appendix "CRC16 reference implementation",
// whose comment gives this output; also the XMODEM entry of Greg Cook's
// "Catalogue of parametrised CRC algorithms"; recalled from memory).
func TestCluster3CRC16CheckValue(t *testing.T) {
	if got := CRC16([]byte("123456789")); got != 0x31C3 {
		t.Fatalf("CRC16(123456789) = %#04x, want 0x31c3", got)
	}
}

// TestCluster3Slots starts three masters and checks that every node sees
// the same slot map, that it splits all 16384 slots between three distinct
// loopback masters without overlap, and that each node reports a healthy
// cluster.
func TestCluster3Slots(t *testing.T) {
	c := StartCluster3(t)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	addrs := c.Addrs()
	if len(addrs) != 3 || len(slices.Compact(slices.Sorted(slices.Values(addrs)))) != 3 {
		t.Fatalf("addresses %v, want three distinct", addrs)
	}
	var first []string
	for _, addr := range addrs {
		host, _, err := net.SplitHostPort(addr)
		if err != nil || host != "127.0.0.1" {
			t.Fatalf("node address %q is not on 127.0.0.1 (%v)", addr, err)
		}
		nc := c.NodeClient(addr)
		info, err := nc.ClusterInfo(ctx).Result()
		if err != nil {
			t.Fatalf("%s: cluster info: %v", addr, err)
		}
		f := parseInfo(info)
		if f["cluster_state"] != "ok" || f["cluster_slots_assigned"] != "16384" || f["cluster_known_nodes"] != "3" {
			t.Fatalf("%s: cluster info %v", addr, f)
		}
		ranges, err := nc.ClusterSlots(ctx).Result()
		if err != nil {
			t.Fatalf("%s: cluster slots: %v", addr, err)
		}
		owner := make([]string, ClusterSlots)
		var view []string
		for _, r := range ranges {
			if len(r.Nodes) != 1 {
				t.Fatalf("%s: slots %d-%d served by %d nodes, want one master and no replica", addr, r.Start, r.End, len(r.Nodes))
			}
			for s := r.Start; s <= r.End; s++ {
				if owner[s] != "" {
					t.Fatalf("%s: slot %d owned by %s and %s", addr, s, owner[s], r.Nodes[0].Addr)
				}
				owner[s] = r.Nodes[0].Addr
			}
			view = append(view, fmt.Sprintf("%d-%d@%s", r.Start, r.End, r.Nodes[0].Addr))
		}
		masters := map[string]bool{}
		for s, o := range owner {
			if o == "" {
				t.Fatalf("%s: slot %d has no owner", addr, s)
			}
			if !slices.Contains(addrs, o) {
				t.Fatalf("%s: slot %d owned by %s, not a node of %v", addr, s, o, addrs)
			}
			masters[o] = true
		}
		if len(masters) != 3 {
			t.Fatalf("%s: slots spread over %d masters, want 3", addr, len(masters))
		}
		slices.Sort(view)
		if first == nil {
			first = view
		} else if !slices.Equal(view, first) {
			t.Fatalf("%s sees slot map %v, %s sees %v", addr, view, addrs[0], first)
		}
	}
}

// TestCluster3KeysLandOnTheirMaster checks the cluster's slot of keys,
// hash-tag examples of the specification among them, against HASH_SLOT
// computed here, writes them through the cluster client and checks that
// each is stored on exactly the master MasterOf names (the others answer
// MOVED to it), and that commands and scripts over keys of two slots are
// refused.
func TestCluster3KeysLandOnTheirMaster(t *testing.T) {
	c := StartCluster3(t)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	cc := c.ClusterClient()

	// Hash tag cases from the Redis Cluster specification, section "Hash
	// tags" (recalled from memory): each key is hashed as the text named.
	tags := []struct{ key, hashed string }{
		{"{user1000}.following", "user1000"},
		{"{user1000}.followers", "user1000"},
		{"foo{}{bar}", "foo{}{bar}"},
		{"foo{{bar}}zap", "{bar"},
		{"foo{bar}{zap}", "bar"},
		{"ripen:{x:tea-hero}:meta", "x:tea-hero"},
	}
	for _, tc := range tags {
		t.Run(tc.key, func(t *testing.T) {
			got, err := cc.ClusterKeySlot(ctx, tc.key).Result()
			if err != nil {
				t.Fatal(err)
			}
			if want := int(CRC16([]byte(tc.hashed))) % ClusterSlots; int(got) != want || KeySlot(tc.key) != want {
				t.Fatalf("slot of %q: cluster %d, CRC16(%q) mod 16384 = %d, keySlot %d", tc.key, got, tc.hashed, want, KeySlot(tc.key))
			}
		})
	}

	masters := map[string]int{}
	for i := range 60 {
		key := fmt.Sprintf("key-%d", i)
		if err := cc.Set(ctx, key, i, 0).Err(); err != nil {
			t.Fatalf("set %s: %v", key, err)
		}
		owner, err := c.MasterOf(ctx, key)
		if err != nil {
			t.Fatal(err)
		}
		masters[owner]++
		for _, addr := range c.Addrs() {
			v, err := c.NodeClient(addr).Get(ctx, key).Int()
			switch {
			case addr == owner && (err != nil || v != i):
				t.Fatalf("%s on its master %s: %d, %v; want %d", key, addr, v, err, i)
			case addr != owner && (err == nil || !strings.HasPrefix(err.Error(), fmt.Sprintf("MOVED %d %s", KeySlot(key), owner))):
				t.Fatalf("%s on %s (master %s): %v, want MOVED %d %s", key, addr, owner, err, KeySlot(key), owner)
			}
		}
	}
	if len(masters) != 3 {
		t.Fatalf("60 keys landed on %d masters (%v), want all 3", len(masters), masters)
	}

	// "key-0" and "key-1" hash to different slots.
	if KeySlot("key-0") == KeySlot("key-1") {
		t.Fatal("test keys share a slot")
	}
	owner, err := c.MasterOf(ctx, "key-0")
	if err != nil {
		t.Fatal(err)
	}
	nc := c.NodeClient(owner)
	if err := nc.MSet(ctx, "key-0", "a", "key-1", "b").Err(); err == nil || !strings.HasPrefix(err.Error(), "CROSSSLOT") {
		t.Fatalf("cross-slot MSET: %v, want CROSSSLOT", err)
	}
	if err := nc.Eval(ctx, "return redis.call('GET', KEYS[1])", []string{"key-0", "key-1"}).Err(); err == nil || !strings.HasPrefix(err.Error(), "CROSSSLOT") {
		t.Fatalf("cross-slot script: %v, want CROSSSLOT", err)
	}
}

// TestCluster3Stop checks that Stop ends every node.
func TestCluster3Stop(t *testing.T) {
	c := StartCluster3(t)
	c.Stop()
	for _, n := range c.nodes {
		if err := ping(n.port); err == nil {
			t.Errorf("node on %d still answers after Stop", n.port)
		}
		if n.cmd.ProcessState == nil {
			t.Errorf("node on %d not reaped after Stop", n.port)
		}
	}
	c.Stop() // a second Stop does nothing
}
