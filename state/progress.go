package state

import (
	"context"
	_ "embed"
	"fmt"
	"math"
	"strconv"
	"strings"

	"github.com/redis/go-redis/v9"
)

//go:embed lua/progress.lua
var progressSrc string

var progressScript = redis.NewScript(progressSrc)

// NoTime marks an event time that is not known (nothing reported).
const NoTime int64 = math.MinInt64

// progress is the event-time progress hash of a topic's partitions. One
// key per topic, so a whole topic is read in one command (cluster-safe).
func (k keys) progress(topic string) string { return k.prefix + ":{p:" + topic + "}:progress" }

// PartitionProgress is the event-time progress of one partition as its
// owner reported it: what the group-wide watermark, the hold-back of
// events and the refit barrier are computed from.
type PartitionProgress struct {
	// Partition is the partition number.
	Partition int
	// Seen is the latest event time read from the partition (Unix ms), or
	// NoTime.
	Seen int64
	// Applied is the event time through which every event of the
	// partition is applied (Unix ms), or NoTime.
	Applied int64
	// Idle is set while the partition is caught up and has had no new
	// event for the idle timeout; such a partition does not hold the
	// group back.
	Idle bool
	// Swept is, for a conversion partition, the last refit tick (Unix ms)
	// through which its owner settled the parked orphans due, or NoTime.
	Swept int64
	// Refitted is, for a click partition, the last refit tick (Unix ms)
	// its owner completed for the experiments it owns, or NoTime.
	Refitted int64
	// Generation is the consumer-group generation of the newest writer.
	Generation int32
}

// ReportProgress records the progress of some partitions of topic, owned by
// a consumer of generation gen. Seen, Applied and Swept only move forward
// (NoTime leaves them as they are); Idle is taken unless a newer generation
// wrote the partition. Refitted is ignored (see MarkRefitted).
func (s *Store) ReportProgress(ctx context.Context, topic string, gen int32, parts []PartitionProgress) error {
	const op = "report progress"
	if len(parts) == 0 {
		return nil
	}
	args := []any{"report", gen, len(parts)}
	for _, p := range parts {
		if err := validPartition(topic, p.Partition); err != nil {
			return permanent(op, err)
		}
		args = append(args, p.Partition, timeArg(p.Seen), timeArg(p.Applied), boolArg(p.Idle), timeArg(p.Swept))
	}
	if err := progressScript.Run(ctx, s.rdb, []string{s.keys.progress(topic)}, args...).Err(); err != nil {
		return redisFailure(op, fmt.Errorf("topic %q: %w", topic, err))
	}
	return nil
}

// MarkRefitted records that the owner of click partition topic/partition
// completed the refits of tick (Unix ms); the record only moves forward.
func (s *Store) MarkRefitted(ctx context.Context, topic string, partition int, tick int64) error {
	const op = "mark refitted"
	if err := validPartition(topic, partition); err != nil {
		return permanent(op, err)
	}
	if err := progressScript.Run(ctx, s.rdb, []string{s.keys.progress(topic)}, "refit", partition, tick).Err(); err != nil {
		return redisFailure(op, fmt.Errorf("%s/%d: %w", topic, partition, err))
	}
	return nil
}

// Progress returns the recorded progress of every reported partition of
// each topic, by topic and partition, read in one pipeline.
func (s *Store) Progress(ctx context.Context, topics ...string) (map[string]map[int]PartitionProgress, error) {
	const op = "progress"
	pipe := s.rdb.Pipeline()
	cmds := make([]*redis.MapStringStringCmd, len(topics))
	for i, t := range topics {
		if err := validPartition(t, 0); err != nil {
			return nil, permanent(op, err)
		}
		cmds[i] = pipe.HGetAll(ctx, s.keys.progress(t))
	}
	if _, err := pipe.Exec(ctx); err != nil {
		return nil, redisFailure(op, err)
	}
	out := make(map[string]map[int]PartitionProgress, len(topics))
	for i, t := range topics {
		h, _ := cmds[i].Result()
		m, err := parseProgress(h)
		if err != nil {
			return nil, permanent(op, fmt.Errorf("topic %q: %w", t, err))
		}
		out[t] = m
	}
	return out, nil
}

// parseProgress reads a progress hash.
func parseProgress(h map[string]string) (map[int]PartitionProgress, error) {
	out := map[int]PartitionProgress{}
	get := func(p int) PartitionProgress {
		if pp, ok := out[p]; ok {
			return pp
		}
		return PartitionProgress{Partition: p, Seen: NoTime, Applied: NoTime, Swept: NoTime, Refitted: NoTime}
	}
	for f, v := range h {
		ps, kind, ok := strings.Cut(f, ":")
		p, err := strconv.Atoi(ps)
		if !ok || err != nil || p < 0 {
			return nil, fmt.Errorf("%w: progress field %q", ErrCorrupt, f)
		}
		pp := get(p)
		n, err := strconv.ParseInt(v, 10, 64)
		if err != nil {
			return nil, fmt.Errorf("%w: progress %q = %q", ErrCorrupt, f, v)
		}
		switch kind {
		case "s":
			pp.Seen = n
		case "a":
			pp.Applied = n
		case "i":
			pp.Idle = n == 1
		case "r":
			pp.Refitted = n
		case "w":
			pp.Swept = n
		case "g":
			pp.Generation = int32(n)
		default:
			return nil, fmt.Errorf("%w: progress field %q", ErrCorrupt, f)
		}
		out[p] = pp
	}
	return out, nil
}

func timeArg(t int64) string {
	if t == NoTime {
		return ""
	}
	return strconv.FormatInt(t, 10)
}

func boolArg(b bool) string {
	if b {
		return "1"
	}
	return "0"
}
