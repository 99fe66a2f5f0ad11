package closedloop

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"slices"
	"sync"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/consumer"
)

// allocWatch collects the allocation messages read from the allocation
// topic, as a serving layer would.
type allocWatch struct {
	mu     sync.Mutex
	all    []consumer.Allocation
	bodies [][]byte
	latest consumer.Allocation
	asOf   int64
	seen   chan struct{} // signalled on every new message
}

func newAllocWatch() *allocWatch {
	return &allocWatch{asOf: math.MinInt64, seen: make(chan struct{}, 1)}
}

// read consumes one partition of the allocation topic until ctx ends.
func (w *allocWatch) read(ctx context.Context, brokers []string, topic string, partition int) {
	r := kafka.NewReader(kafka.ReaderConfig{Brokers: brokers, Topic: topic, Partition: partition, MaxWait: 50 * time.Millisecond, StartOffset: kafka.FirstOffset})
	defer r.Close()
	for {
		m, err := r.ReadMessage(ctx)
		if err != nil {
			return // ctx ended (a reader retries transient errors itself)
		}
		var a consumer.Allocation
		if err := json.Unmarshal(m.Value, &a); err != nil {
			continue
		}
		t, err := time.Parse(time.RFC3339Nano, a.AsOf)
		if err != nil {
			continue
		}
		w.mu.Lock()
		w.all = append(w.all, a)
		w.bodies = append(w.bodies, m.Value)
		if t.UnixMilli() >= w.asOf {
			w.latest, w.asOf = a, t.UnixMilli()
		}
		w.mu.Unlock()
		select {
		case w.seen <- struct{}{}:
		default:
		}
	}
}

// waitTick waits until an allocation as of tick or later was read, and
// returns the latest one. It also returns, with ok false unless some
// allocation was read, when skipped reports that the service refitted
// past the tick without publishing (a failed fit is logged and retried on
// the next tick).
func (w *allocWatch) waitTick(ctx context.Context, tick int64, skipped func() bool) (consumer.Allocation, bool, error) {
	deadline := time.NewTimer(waitTimeout)
	defer deadline.Stop()
	poll := time.NewTicker(20 * time.Millisecond)
	defer poll.Stop()
	for {
		w.mu.Lock()
		latest, asOf := w.latest, w.asOf
		w.mu.Unlock()
		if asOf >= tick {
			return latest, true, nil
		}
		if skipped() {
			// Give the publication of this refit a moment to be read.
			select {
			case <-w.seen:
				continue
			case <-time.After(200 * time.Millisecond):
			}
			w.mu.Lock()
			latest, asOf = w.latest, w.asOf
			w.mu.Unlock()
			return latest, asOf != math.MinInt64, nil
		}
		select {
		case <-ctx.Done():
			return consumer.Allocation{}, false, ctx.Err()
		case <-deadline.C:
			return consumer.Allocation{}, false, fmt.Errorf("no refit within %v", waitTimeout)
		case <-w.seen:
		case <-poll.C:
		}
	}
}

// history returns the allocations read, by seq, once each.
func (w *allocWatch) history() []consumer.Allocation {
	w.mu.Lock()
	all := slices.Clone(w.all)
	w.mu.Unlock()
	slices.SortStableFunc(all, func(a, b consumer.Allocation) int { return int(a.Seq - b.Seq) })
	return slices.CompactFunc(all, func(a, b consumer.Allocation) bool { return a.Seq == b.Seq })
}

// raw returns the messages read, as read.
func (w *allocWatch) raw() [][]byte {
	w.mu.Lock()
	defer w.mu.Unlock()
	return slices.Clone(w.bodies)
}
