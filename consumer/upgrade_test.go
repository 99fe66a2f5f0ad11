package consumer

import (
	"context"
	"encoding/binary"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/segmentio/kafka-go"
)

// firstLayoutEntry writes a click index entry of the first layout (see
// DEVELOPERS.md, "Key layouts"): uvarint length and experiment, uvarint
// length and arm, signed varint click time, uvarint length and origin.
func firstLayoutEntry(c Click, origin string) []byte {
	var b []byte
	for _, s := range []string{c.Experiment, c.Arm} {
		b = binary.AppendUvarint(b, uint64(len(s)))
		b = append(b, s...)
	}
	b = binary.AppendVarint(b, c.TS)
	b = binary.AppendUvarint(b, uint64(len(origin)))
	return append(b, origin...)
}

// downgradeIndex rewrites the click index under the default prefix as the
// first layout kept it, as if an instance of that layout had consumed
// what the store holds: an entry key per click read from the click topic
// and an orphan hash per parked conversion (from the second layout's
// orphan records: state, origin, "\n", deadline, "\n", varint conversion
// time, original bytes); then every key of the second layout goes. It
// returns the number of entries and orphans written.
func downgradeIndex(t *testing.T, env *testEnv, cfg Config) (entries, orphans int) {
	t.Helper()
	ctx := context.Background()
	rdb := env.redis.Client()
	p := DefaultPrefix
	for _, m := range env.readAll(t, cfg.Kafka.ClickTopic) {
		c, err := DecodeClick(m.Value)
		if err != nil {
			continue
		}
		org := cfg.Kafka.ClickTopic + "/" + strconv.Itoa(m.Partition) + "/" + strconv.FormatInt(m.Offset, 10)
		if err := rdb.Set(ctx, p+":{k:"+c.ClickID+"}:c", firstLayoutEntry(c, org), 2*time.Hour).Err(); err != nil {
			t.Fatal(err)
		}
		entries++
	}
	keys, err := rdb.Keys(ctx, p+":{i*").Result()
	if err != nil {
		t.Fatal(err)
	}
	for _, k := range keys {
		if !strings.HasSuffix(k, "}:o") {
			continue
		}
		h, err := rdb.HGetAll(ctx, k).Result()
		if err != nil {
			t.Fatal(err)
		}
		for id, rec := range h {
			org, rest, ok1 := strings.Cut(rec[1:], "\n")
			dl, rest, ok2 := strings.Cut(rest, "\n")
			ts, n := binary.Varint([]byte(rest))
			tp, _, err := parseOrigin(org)
			if !ok1 || !ok2 || n <= 0 || err != nil {
				t.Fatalf("orphan record %q of %q", rec, id)
			}
			if err := rdb.HSet(ctx, p+":{k:"+id+"}:o", "s", rec[:1], "org", org, "ts", ts, "dl", dl, "tp", tp.Topic, "pt", tp.Partition, "raw", rest[n:]).Err(); err != nil {
				t.Fatal(err)
			}
			orphans++
		}
	}
	if len(keys) > 0 {
		if err := rdb.Del(ctx, keys...).Err(); err != nil {
			t.Fatal(err)
		}
	}
	return entries, orphans
}

// TestUpgradeFromFirstLayout consumes the first half of a stream, rewrites
// the click index as the first layout (one key per click, one hash per
// parked conversion) left it, and consumes the rest with the second
// layout: conversions of the old clicks join them, old parked conversions
// are claimed by their clicks or expire, and the state equals the offline
// join of the whole stream.
func TestUpgradeFromFirstLayout(t *testing.T) {
	env := newTestEnv(t, 3)
	s := genStream(31, 2000, time.Hour)
	cfg := env.config("upgrade")
	half := len(s.clicks) / 2
	var split int64
	if c, err := DecodeClick(s.clicks[half-1].Value); err == nil {
		split = c.TS
	} else {
		t.Fatal(err)
	}
	var convsA, convsB []kafka.Message
	for _, m := range s.convs {
		v, err := DecodeConversion(m.Value)
		if err == nil && v.TS <= split {
			convsA = append(convsA, m)
		} else {
			convsB = append(convsB, m)
		}
	}

	// The first half, consumed by a service whose index is then turned
	// into the first layout's.
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks[:half])
	env.produce(t, cfg.Kafka.ConversionTopic, convsA)
	_, stop := env.start(t, cfg, testLogger(t), testHooks{}, nil)
	env.waitConsumed(t, cfg, 60*time.Second)
	if err := stop(); err != nil {
		t.Fatalf("first run: %v", err)
	}
	entries, orphans := downgradeIndex(t, env, cfg)
	if entries != half || orphans == 0 {
		t.Fatalf("first layout: %d entries (want %d) and %d orphans (want some)", entries, half, orphans)
	}

	// The rest, consumed with the second layout.
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks[half:])
	env.produce(t, cfg.Kafka.ConversionTopic, convsB)
	_, stop = env.start(t, cfg, testLogger(t), testHooks{}, nil)
	env.finish(t, cfg, s)
	if err := stop(); err != nil {
		t.Fatalf("second run: %v", err)
	}
	ctx := context.Background()
	legacy, err := env.redis.Client().HGet(ctx, DefaultPrefix+":{i}:meta", "legacy").Int64()
	if err != nil && err != redis.Nil {
		t.Fatal(err)
	}
	if legacy < split {
		t.Errorf("legacy bound %d, want at least the first half's last click time %d", legacy, split)
	}
	whole := s
	whole.convs = append(append([]kafka.Message{}, convsA...), convsB...)
	off := checkAgainstOffline(t, env.store, whole)
	checkReasons(t, deadLetterReasons(t, env.readAll(t, cfg.Kafka.DeadLetterTopic)), offlineReasons(off))
	// Every old orphan is settled: claimed by its click, or expired.
	left, err := env.redis.Client().Keys(ctx, DefaultPrefix+":{k:*}:o").Result()
	if err != nil {
		t.Fatal(err)
	}
	if len(left) != 0 {
		t.Errorf("%d old orphans left unsettled: %v", len(left), left)
	}
}
