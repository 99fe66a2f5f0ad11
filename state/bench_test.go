package state

import (
	"context"
	"fmt"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"ripen/estimator"
)

// benchDelta builds the i-th delta of a stream: 1,000 clicks spread over
// the last ten minutes before its watermark and 50 conversions, over four
// arms, covering the next 1,050 offsets of one partition.
func benchDelta(i int) *ExperimentDelta {
	l := estimator.Layout{}.WithDefaults()
	wm := t0 + int64(i)*1000
	arms := []string{"arm-a", "arm-b", "arm-c", "arm-d"}
	d := &ExperimentDelta{
		Experiment: "spring-banner", Layout: l, Watermark: wm, Generation: 1,
		Ranges: []OffsetRange{{Topic: "events", Partition: 0, From: int64(i) * 1050, To: int64(i)*1050 + 1049}},
		Arms:   map[string]*ArmDelta{},
	}
	keyOf := map[int64]estimator.BucketKey{}
	for c := range 1000 {
		a := d.Arms[arms[c%4]]
		if a == nil {
			a = &ArmDelta{}
			d.Arms[arms[c%4]] = a
		}
		ts := wm - int64(c)*600
		k, ok := keyOf[ts]
		if !ok {
			k, _ = bucketAt(l, wm, ts)
			keyOf[ts] = k
		}
		if n := len(a.Clicks); n > 0 && a.Clicks[n-1].BucketKey == k {
			a.Clicks[n-1].Clicks++
		} else {
			a.Clicks = append(a.Clicks, estimator.Bucket{BucketKey: k, BucketCounts: estimator.BucketCounts{Clicks: 1}})
		}
	}
	for c := range 50 {
		ts := wm - int64(c)*12_000
		k, _ := bucketAt(l, wm, ts)
		a := d.Arms[arms[c%4]]
		a.Conversions = append(a.Conversions, ConversionDelta{
			ClickID: fmt.Sprintf("click-%d-%d", i, c), Origin: fmt.Sprintf("events/0/%d", int64(i)*1050+1000+int64(c)),
			Bucket: k, DelayBin: 3, DelayMs: 90_000,
		})
	}
	return d
}

// BenchmarkApply measures one Apply of a 1,000-click, 50-conversion,
// four-arm delta against a local redis-server.
func BenchmarkApply(b *testing.B) {
	s, _, _ := newStore(b, Options{})
	ctx := context.Background()
	const prepared = 256
	deltas := make([]*ExperimentDelta, prepared)
	for i := range deltas {
		deltas[i] = benchDelta(i)
	}
	var fields int
	for _, a := range deltas[0].Arms {
		fields += len(a.Clicks)
	}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		d := deltas[i%prepared]
		if i >= prepared {
			// Later laps reuse the deltas at later offsets.
			c := *d
			lap := int64(i / prepared)
			c.Ranges = []OffsetRange{{Topic: "events", Partition: 0, From: d.Ranges[0].From + lap*prepared*1050, To: d.Ranges[0].To + lap*prepared*1050}}
			d = &c
		}
		if _, err := s.Apply(ctx, d); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(fields), "click-buckets/delta")
}

// BenchmarkPutClicks measures PutClicks of batches of 1,000 clicks and
// reports the server memory each click takes (growth of used_memory).
func BenchmarkPutClicks(b *testing.B) {
	s, rdb, _ := newStore(b, Options{})
	ctx := context.Background()
	const batch = 1000
	recs := make([]ClickRecord, batch)
	before := usedMemory(b, ctx, rdb)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		for j := range recs {
			recs[j] = ClickRecord{ClickID: clickID(i*batch + j), Experiment: "spring-banner", Arm: "arm-b", TS: t0 + int64(i*batch+j), Window: 7 * 24 * time.Hour}
		}
		if _, err := s.PutClicks(ctx, recs); err != nil {
			b.Fatal(err)
		}
	}
	b.StopTimer()
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*batch), "ns/click")
	b.ReportMetric(float64(usedMemory(b, ctx, rdb)-before)/float64(b.N*batch), "bytes/click")
}

// clickID is a realistic 20-character click id.
func clickID(i int) string { return fmt.Sprintf("ck-%017x", uint64(i)*0x9e3779b97f4a7c15) }

func usedMemory(t testing.TB, ctx context.Context, rdb *redis.Client) int64 {
	t.Helper()
	info, err := rdb.Info(ctx, "memory").Result()
	if err != nil {
		t.Fatal(err)
	}
	for _, line := range strings.Split(info, "\r\n") {
		if v, ok := strings.CutPrefix(line, "used_memory:"); ok {
			n, err := strconv.ParseInt(v, 10, 64)
			if err != nil {
				t.Fatal(err)
			}
			return n
		}
	}
	t.Fatal("no used_memory in INFO")
	return 0
}
