package consumer

import (
	"context"
	"slices"
	"testing"
	"time"
)

// TestRefitCompactsArms consumes a long stream with refits and checks that
// the refit owner keeps every arm hash compact: its field count stays
// within twice the canonical field count of the arm's loaded state (two
// per pending bucket, clicks and conversions, one per non-empty delay bin,
// plus the matured and delay totals), where without compaction the
// buckets keyed while the watermark was still unknown, or early in a
// bucket's life, pile up as fine fields. The counts still equal the
// offline join's.
func TestRefitCompactsArms(t *testing.T) {
	env := newTestEnv(t, 3)
	s := genStream(11, 3000, time.Hour)
	cfg := env.config("compact")
	cfg.Pipeline.FlushEvents = 100
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)

	_, stop := env.start(t, cfg, testLogger(t), testHooks{}, nil)
	env.finish(t, cfg, s)
	if err := stop(); err != nil {
		t.Fatalf("run: %v", err)
	}
	checkAgainstOffline(t, env.store, s)

	ctx := context.Background()
	rdb := env.redis.Client()
	ids, err := env.store.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	slices.Sort(ids)
	if len(ids) != 2 {
		t.Fatalf("experiments %v, want the stream's 2", ids)
	}
	for _, id := range ids {
		ex, err := env.store.Load(ctx, id)
		if err != nil {
			t.Fatal(err)
		}
		for _, arm := range ex.Arms {
			t.Run(id+"/"+arm, func(t *testing.T) {
				snap := ex.States[arm].Snapshot()
				canonical := 4 // mc, mv, dn, ds
				for _, b := range snap.Buckets {
					if b.Clicks > 0 {
						canonical++
					}
					if b.Converted > 0 {
						canonical++
					}
				}
				for _, n := range snap.Delays {
					if n > 0 {
						canonical++
					}
				}
				key := cfg.Redis.Prefix + ":{x:" + id + "}:a:" + arm
				n, err := rdb.HLen(ctx, key).Result()
				if err != nil {
					t.Fatal(err)
				}
				if n == 0 {
					t.Fatalf("%s: no such hash", key)
				}
				if n > int64(2*canonical) {
					t.Errorf("%s holds %d fields, canonical form %d: not compacted", key, n, canonical)
				}
				t.Logf("%s: %d fields, canonical %d", key, n, canonical)
			})
		}
	}
}
