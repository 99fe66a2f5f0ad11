package pipebench

import (
	"cmp"
	"context"
	"encoding/json"
	"fmt"
	"maps"
	"math/rand/v2"
	"slices"
	"strconv"
	"time"

	"github.com/segmentio/kafka-go"

	"ripen/consumer"
	"ripen/state"
)

// workload is the generated events.
type workload struct {
	clicks, convs []kafka.Message
	// experiments and their arms.
	experiments map[string][]string
}

// t0 is the event time of the first generated click,
// 2031-06-01T00:00:00Z.
const t0 int64 = 1938124800000

// clickEvery is the event time between two generated clicks.
const clickEvery = 100 * time.Millisecond

// generate returns n events: clicks of three invented experiments of four
// arms each, one every 100 ms of event time, about 8% of them converting
// after an exponential delay (mean 6 hours, within the default 7-day
// window). Conversions carry their attribution (experiment, arm, click
// time), so that both attribution modes read the same events; with the
// click index they are joined by click id all the same and their fields
// only checked. Each topic is in event-time order, as a producer that
// writes events when they happen leaves it: the conversions are sorted by
// their own time, not by their clicks'.
func generate(n int) workload {
	r := rand.New(rand.NewPCG(2031, 6))
	w := workload{experiments: map[string][]string{
		"cafe-menu":    {"espresso", "latte", "mocha", "cortado"},
		"garden-promo": {"tulip", "fern", "ivy", "moss"},
		"bookshop-cta": {"read-now", "browse", "preview", "sample"},
	}}
	ids := slices.Sorted(maps.Keys(w.experiments))
	meanDelay := 6 * float64(time.Hour.Milliseconds())
	var convs []consumer.Conversion
	for i := 0; len(w.clicks)+len(convs) < n; i++ {
		c := click(i, ids, w.experiments, r)
		w.clicks = append(w.clicks, message(c.ClickID, c))
		if len(w.clicks)+len(convs) < n && r.Float64() < 0.08 {
			d := int64(r.ExpFloat64() * meanDelay)
			convs = append(convs, consumer.Conversion{ClickID: c.ClickID, TS: c.TS + d, Experiment: c.Experiment, Arm: c.Arm, ClickTS: c.TS})
		}
	}
	slices.SortStableFunc(convs, func(a, b consumer.Conversion) int { return cmp.Compare(a.TS, b.TS) })
	for _, c := range convs {
		w.convs = append(w.convs, message(c.ClickID, c))
	}
	return w
}

// click is the i-th generated click.
func click(i int, ids []string, exps map[string][]string, r *rand.Rand) consumer.Click {
	exp := ids[i%len(ids)]
	arms := exps[exp]
	id := "k" + strconv.Itoa(i)
	return consumer.Click{ClickID: id, Experiment: exp, Arm: arms[r.IntN(len(arms))], TS: t0 + int64(i)*clickEvery.Milliseconds()}
}

func message(key string, v any) kafka.Message {
	b, err := json.Marshal(v)
	if err != nil {
		panic(err) // Click and Conversion always encode
	}
	return kafka.Message{Key: []byte(key), Value: b}
}

// produce writes msgs to topic, partitioned by key.
func produce(ctx context.Context, brokers []string, topic string, msgs []kafka.Message) error {
	w := &kafka.Writer{Addr: kafka.TCP(brokers...), Topic: topic, Balancer: &kafka.Hash{}, RequiredAcks: kafka.RequireAll, BatchTimeout: 5 * time.Millisecond, BatchSize: 1000}
	defer w.Close()
	for i := 0; i < len(msgs); i += 1000 {
		if err := w.WriteMessages(ctx, msgs[i:min(i+1000, len(msgs))]...); err != nil {
			return fmt.Errorf("bench: produce to %s: %w", topic, err)
		}
	}
	return nil
}

// endOffsets returns the end offset of every partition of topics.
func endOffsets(ctx context.Context, brokers []string, topics []string) (map[state.TopicPartition]int64, error) {
	out := map[state.TopicPartition]int64{}
	for _, topic := range topics {
		parts, err := kafka.LookupPartitions(ctx, "tcp", brokers[0], topic)
		if err != nil {
			return nil, fmt.Errorf("bench: partitions of %s: %w", topic, err)
		}
		for _, p := range parts {
			conn, err := kafka.DialLeader(ctx, "tcp", brokers[0], topic, p.ID)
			if err != nil {
				return nil, fmt.Errorf("bench: dial %s/%d: %w", topic, p.ID, err)
			}
			end, err := conn.ReadLastOffset()
			conn.Close()
			if err != nil {
				return nil, fmt.Errorf("bench: end of %s/%d: %w", topic, p.ID, err)
			}
			out[state.TopicPartition{Topic: topic, Partition: p.ID}] = end
		}
	}
	return out, nil
}

// totals adds up the clicks and conversions stored for the workload's
// experiments.
func totals(ctx context.Context, st *state.Store, w workload) (Counts, error) {
	var c Counts
	for id := range w.experiments {
		ex, err := st.Load(ctx, id)
		if err != nil {
			return c, fmt.Errorf("bench: load %q: %w", id, err)
		}
		for _, s := range ex.States {
			c.Clicks += s.Clicks()
			c.Conversions += s.Conversions()
		}
	}
	return c, nil
}
