package consumer

import (
	"context"
	"encoding/json"
	"fmt"
	"strconv"
	"unicode/utf8"

	"github.com/segmentio/kafka-go"
)

// ReasonLayoutMismatch: the event's experiment is stored with another
// state layout than the one this consumer computed its delta with (two
// consumers created the experiment at once with different windows); the
// event is refused rather than counted in the wrong buckets.
const ReasonLayoutMismatch Reason = "layout_mismatch"

// DeadLetter is one dead-letter message: an event the pipeline refused,
// with where it was read and why. It is the JSON value written to the
// dead-letter topic (key: "<topic>/<partition>/<offset>").
type DeadLetter struct {
	// Reason is the machine-readable cause.
	Reason Reason `json:"reason"`
	// Detail explains the cause for people.
	Detail string `json:"detail,omitempty"`
	// Topic, Partition and Offset locate the original message.
	Topic     string `json:"topic"`
	Partition int    `json:"partition"`
	Offset    int64  `json:"offset"`
	// Value is the original message value, base64-encoded in JSON.
	Value []byte `json:"value"`
	// Text is the original value as a string when it is valid UTF-8, for
	// reading without decoding base64.
	Text string `json:"text,omitempty"`
}

// newDeadLetter builds the dead letter of a message refused for rej.
func newDeadLetter(topic string, partition int, offset int64, value []byte, rej *RejectError) DeadLetter {
	d := DeadLetter{Reason: rej.Reason, Detail: rej.Detail, Topic: topic, Partition: partition, Offset: offset, Value: value}
	if utf8.Valid(value) {
		d.Text = string(value)
	}
	return d
}

// origin is the "<topic>/<partition>/<offset>" name of the message.
func (d DeadLetter) origin() string {
	return d.Topic + "/" + strconv.Itoa(d.Partition) + "/" + strconv.FormatInt(d.Offset, 10)
}

// messageWriter is the part of *kafka.Writer the pipeline uses.
type messageWriter interface {
	WriteMessages(ctx context.Context, msgs ...kafka.Message) error
	Close() error
}

// deadLetters writes dead letters synchronously; a batch's dead letters are
// written before its offsets are committed, so none is lost (a crash may
// write some twice).
type deadLetters struct {
	w       messageWriter
	metrics *Metrics
}

// write sends every dead letter of a batch in one synchronous call.
func (d *deadLetters) write(ctx context.Context, dls []DeadLetter) error {
	if len(dls) == 0 {
		return nil
	}
	msgs := make([]kafka.Message, len(dls))
	for i, dl := range dls {
		v, err := json.Marshal(dl)
		if err != nil {
			return fmt.Errorf("dead letter %s: %w", dl.origin(), err)
		}
		msgs[i] = kafka.Message{Key: []byte(dl.origin()), Value: v}
	}
	if err := d.w.WriteMessages(ctx, msgs...); err != nil {
		return fmt.Errorf("write %d dead letters: %w", len(msgs), err)
	}
	if d.metrics != nil {
		d.metrics.DeadLetterPublished.Add(float64(len(msgs)))
		for _, dl := range dls {
			d.metrics.EventsRejected.WithLabelValues(string(dl.Reason)).Inc()
		}
	}
	return nil
}
