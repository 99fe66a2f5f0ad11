package consumer

import (
	"slices"
	"sort"
	"strconv"

	"ripen/state"
)

// fetched is one message read from an assigned partition.
type fetched struct {
	tp     state.TopicPartition
	offset int64
	value  []byte
	// hwm is the partition's high watermark (next offset to be written)
	// when the message was fetched.
	hwm int64
	// ts is the event time of a decodable event; hasTS is false for a
	// message that does not decode (it is dead-lettered, never held back).
	ts    int64
	hasTS bool
	// dec is the event as receive decoded it, so that flush does not
	// decode it again; nil if it was not decoded yet.
	dec *decoded
}

// decode decodes m by its topic and sets its event time. The partition
// readers call it, so that decoding runs on one goroutine per partition,
// beside the flush, rather than on the pipeline's.
func (m *fetched) decode(cfg Config) {
	switch m.tp.Topic {
	case cfg.Kafka.ClickTopic:
		d := &decoded{}
		if d.click, d.err = DecodeClick(m.value); d.err == nil {
			m.ts, m.hasTS = d.click.TS, true
		}
		m.dec = d
	case cfg.Kafka.ConversionTopic:
		d := &decoded{}
		if d.conv, d.err = DecodeConversion(m.value); d.err == nil {
			m.ts, m.hasTS = d.conv.TS, true
		}
		m.dec = d
	}
}

// decoded is a message decoded by its topic: click or conv is set, or err
// says why it does not decode.
type decoded struct {
	click Click
	conv  Conversion
	err   error
}

// origin names a message as "<topic>/<partition>/<offset>".
func origin(tp state.TopicPartition, offset int64) string {
	return tp.Topic + "/" + strconv.Itoa(tp.Partition) + "/" + strconv.FormatInt(offset, 10)
}

// batch is the messages of one flush: for each partition a contiguous run
// of offsets starting at the partition's resume offset.
type batch struct {
	msgs   []fetched
	ranges map[state.TopicPartition]*state.OffsetRange
	order  []state.TopicPartition // partitions in first-seen order
}

func newBatch() *batch {
	return &batch{ranges: make(map[state.TopicPartition]*state.OffsetRange)}
}

func (b *batch) add(m fetched) {
	b.msgs = append(b.msgs, m)
	r := b.ranges[m.tp]
	if r == nil {
		b.ranges[m.tp] = &state.OffsetRange{Topic: m.tp.Topic, Partition: m.tp.Partition, From: m.offset, To: m.offset}
		b.order = append(b.order, m.tp)
		return
	}
	r.To = m.offset
}

func (b *batch) len() int { return len(b.msgs) }

// value returns the bytes of the batch's message at offset of tp (for a
// dead letter). release adds each partition's messages as one run in
// offset order, so a binary search in the run finds it; a batch built
// otherwise is searched through.
func (b *batch) value(tp state.TopicPartition, offset int64) ([]byte, bool) {
	r := b.ranges[tp]
	if r == nil || offset < r.From || offset > r.To {
		return nil, false
	}
	if i := slices.IndexFunc(b.msgs, func(m fetched) bool { return m.tp == tp }); i >= 0 {
		j := i + sort.Search(len(b.msgs)-i, func(k int) bool {
			n := b.msgs[i+k]
			return n.tp != tp || n.offset >= offset
		})
		if j < len(b.msgs) && b.msgs[j].tp == tp && b.msgs[j].offset == offset {
			return b.msgs[j].value, true
		}
	}
	for _, m := range b.msgs {
		if m.tp == tp && m.offset == offset {
			return m.value, true
		}
	}
	return nil, false
}

// lastOf returns the batch's last message of tp.
func (b *batch) lastOf(tp state.TopicPartition) fetched {
	for i := len(b.msgs) - 1; i >= 0; i-- {
		if b.msgs[i].tp == tp {
			return b.msgs[i]
		}
	}
	return fetched{}
}
