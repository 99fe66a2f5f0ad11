package consumer

import (
	"context"
	"errors"
	"fmt"
	"math"
	"sync"

	"ripen/state"
)

// The join stage, the first of a flush (then delta.go, then apply.go): the
// messages of a released batch are decoded and checked; clicks are
// indexed in the click index (or, for an experiment whose conversions
// carry their attribution, only counted), and each conversion is joined
// to its click, parked in Redis until the click comes, counted from its
// own fields, or refused. What counts leaves as joinedEvents, what does
// not as dead letters.

// clickEvent and convEvent are decoded events with where they were read.
type clickEvent struct {
	m   fetched
	c   Click
	org string // origin(m.tp, m.offset)
}

type convEvent struct {
	m   fetched
	v   Conversion
	org string
}

// joinedEvent is one event that counts for an experiment: a click, or a
// conversion joined to its click (clickID, convTS set). tp and offset
// name the message that makes it count: the event itself, or the click
// that claimed a parked conversion.
type joinedEvent struct {
	e       *expInfo
	arm     string
	tp      state.TopicPartition
	offset  int64
	origin  string
	clickTS int64
	conv    bool
	clickID string
	convTS  int64
}

// joined is a batch after the join: the events that count, the
// experiments whose offsets the batch covers without an event counting,
// the dead letters, and the batch's earliest event time.
type joined struct {
	b        *batch
	events   []joinedEvent
	touched  []*expInfo
	dls      []DeadLetter
	earliest int64
	// raw holds the original bytes of parked conversions that clicks
	// claimed, by origin (the batch's own messages are found in it).
	raw map[string][]byte
}

// refuse adds a dead letter for the message read at org.
func (j *joined) refuse(s *Service, org string, rej *RejectError) {
	j.dls = append(j.dls, s.deadLetter(org, j.rawOf(org), rej))
}

// rawOf returns the original bytes of the message read at org, if known.
func (j *joined) rawOf(org string) []byte {
	if v, ok := j.raw[org]; ok {
		return v
	}
	if tp, off, err := parseOrigin(org); err == nil {
		if v, ok := j.b.value(tp, off); ok {
			return v
		}
	}
	return nil
}

// join runs the join stage on batch b.
func (g *genState) join(ctx context.Context, b *batch) (*joined, error) {
	cfg := g.s.config()
	j := &joined{b: b, earliest: math.MaxInt64, raw: map[string][]byte{}}
	clicks, convs := g.decodeBatch(cfg, j)
	records, indexed, err := g.countClicks(ctx, cfg, j, clicks)
	if err != nil {
		return nil, err
	}
	lookups, looked, same, err := g.carryConversions(ctx, cfg, j, convs, records)
	if err != nil {
		return nil, err
	}
	put, found, err := g.indexAndLookUp(ctx, records, lookups)
	if err != nil {
		return nil, err
	}
	if err := g.joinIndexed(ctx, cfg, j, indexed, put); err != nil {
		return nil, err
	}
	if err := g.joinSameBatch(ctx, cfg, j, convs, same, records, put); err != nil {
		return nil, err
	}
	for k, i := range looked {
		if err := g.joinLookedUp(ctx, cfg, j, convs[i], found[k]); err != nil {
			return nil, err
		}
	}
	return j, nil
}

// decodeBatch decodes and checks the batch's messages (the partition
// readers decoded most of them already), refusing the bad ones, and counts
// them for the metric.
func (g *genState) decodeBatch(cfg Config, j *joined) ([]clickEvent, []convEvent) {
	s := g.s
	clicks := make([]clickEvent, 0, len(j.b.msgs))
	var convs []convEvent
	consumed := map[string]int{}
	for _, m := range j.b.msgs {
		consumed[m.tp.Topic]++
		var rej *RejectError
		d := m.dec
		switch m.tp.Topic {
		case cfg.Kafka.ClickTopic:
			if d == nil {
				d = &decoded{}
				d.click, d.err = DecodeClick(m.value)
			}
			if errors.As(d.err, &rej) {
				break
			}
			if rej = checkStorable(d.click.Experiment); rej != nil {
				break
			}
			j.earliest = min(j.earliest, d.click.TS)
			clicks = append(clicks, clickEvent{m: m, c: d.click, org: origin(m.tp, m.offset)})
		case cfg.Kafka.ConversionTopic:
			if d == nil {
				d = &decoded{}
				d.conv, d.err = DecodeConversion(m.value)
			}
			if errors.As(d.err, &rej) {
				break
			}
			if v := d.conv; v.Experiment != "" {
				if rej = checkStorable(v.Experiment); rej != nil {
					break
				}
			}
			j.earliest = min(j.earliest, d.conv.TS)
			convs = append(convs, convEvent{m: m, v: d.conv, org: origin(m.tp, m.offset)})
		default:
			rej = reject(ReasonMalformedJSON, "message from unexpected topic %q", m.tp.Topic)
		}
		if rej != nil {
			j.refuse(s, origin(m.tp, m.offset), rej)
		}
	}
	if s.metrics != nil {
		for topic, n := range consumed {
			s.metrics.EventsConsumed.WithLabelValues(topic).Add(float64(n))
		}
	}
	return clicks, convs
}

// countClicks admits each click's experiment and arm, skips redelivered
// ones, counts the clicks of experiments whose conversions carry their
// attribution, and returns the others as records for the click index.
func (g *genState) countClicks(ctx context.Context, cfg Config, j *joined, clicks []clickEvent) ([]state.ClickRecord, []clickEvent, error) {
	records := make([]state.ClickRecord, 0, len(clicks))
	indexed := make([]clickEvent, 0, len(clicks))
	for _, ce := range clicks {
		e, rej, err := g.experiment(ctx, cfg, ce.c.Experiment, ce.c.Arm)
		if err != nil {
			return nil, nil, err
		}
		if rej != nil {
			j.refuse(g.s, ce.org, rej)
			continue
		}
		if e.seen(ce.m.tp, ce.m.offset) {
			continue
		}
		if g.carried(cfg, e.id) {
			j.events = append(j.events, joinedEvent{e: e, arm: ce.c.Arm, tp: ce.m.tp, offset: ce.m.offset, origin: ce.org, clickTS: ce.c.TS})
			continue
		}
		records = append(records, state.ClickRecord{ClickID: ce.c.ClickID, Experiment: ce.c.Experiment, Arm: ce.c.Arm, TS: ce.c.TS, Window: e.layout.Window, Origin: ce.org})
		indexed = append(indexed, ce)
	}
	return records, indexed, nil
}

// carryConversions counts the conversions that carry their attribution
// for an experiment that uses it and refuses those that lack it where it
// is required. Of the others, it returns lookups for those whose click is
// not one of this batch's records (looked: their indices in convs) and
// the indices of those whose click is (same).
func (g *genState) carryConversions(ctx context.Context, cfg Config, j *joined, convs []convEvent, records []state.ClickRecord) (lookups []state.ConversionLookup, looked, same []int, err error) {
	s := g.s
	inBatch := make(map[string]bool, len(records))
	for _, r := range records {
		inBatch[r.ClickID] = true
	}
	indexes := cfg.indexes()
	for i, cv := range convs {
		v := cv.v
		named := v.Experiment != "" && g.carried(cfg, v.Experiment)
		switch {
		case named && v.Attributed:
			e, rej, err := g.experiment(ctx, cfg, v.Experiment, v.Arm)
			if err != nil {
				return nil, nil, nil, err
			}
			if rej != nil {
				j.refuse(s, cv.org, rej)
				continue
			}
			if e.seen(cv.m.tp, cv.m.offset) {
				continue
			}
			j.touched = append(j.touched, e)
			if rej := checkDelay(v.ClickTS, v.TS, e.windowMs); rej != nil {
				j.refuse(s, cv.org, rej)
				continue
			}
			j.events = append(j.events, joinedEvent{e: e, arm: v.Arm, tp: cv.m.tp, offset: cv.m.offset, origin: cv.org, clickTS: v.ClickTS, conv: true, clickID: v.ClickID, convTS: v.TS})
		case named || (!indexes && !v.Attributed):
			j.refuse(s, cv.org, reject(ReasonMissingAttribution, "conversions must carry experiment, arm and click_ts (attribution: carried)"))
		case inBatch[v.ClickID]:
			same = append(same, i)
		default:
			lookups = append(lookups, state.ConversionLookup{
				ClickID: v.ClickID, TS: v.TS, Origin: cv.org, Raw: cv.m.value,
				Topic: cv.m.tp.Topic, Partition: cv.m.tp.Partition,
				Deadline: v.TS + cfg.Pipeline.OrphanTTL.Milliseconds(),
			})
			looked = append(looked, i)
		}
	}
	return lookups, looked, same, nil
}

// carried reports whether experiment id's conversions carry their
// attribution (Config.carried), remembered for the generation: the
// setting cannot change at run time.
func (g *genState) carried(cfg Config, id string) bool {
	c, ok := g.carriedOf[id]
	if !ok {
		c = cfg.carried(id)
		if g.carriedOf == nil {
			g.carriedOf = map[string]bool{}
		}
		g.carriedOf[id] = c
	}
	return c
}

// indexAndLookUp indexes the records while it looks up the conversions,
// so that Redis works on one while the other is encoded or decoded.
func (g *genState) indexAndLookUp(ctx context.Context, records []state.ClickRecord, lookups []state.ConversionLookup) ([]state.ClickResult, []state.LookupResult, error) {
	s := g.s
	var put []state.ClickResult
	var found []state.LookupResult
	var putErr, lookErr error
	var wg sync.WaitGroup
	if len(records) > 0 {
		wg.Go(func() {
			putErr = s.retry(ctx, "put clicks", func(ctx context.Context) error {
				var err error
				put, err = s.store.IndexClicks(ctx, records)
				return err
			})
		})
	}
	if len(lookups) > 0 {
		lookErr = s.retry(ctx, "lookup conversions", func(ctx context.Context) error {
			var err error
			found, err = s.store.LookupConversions(ctx, lookups)
			return err
		})
	}
	wg.Wait()
	return put, found, errors.Join(putErr, lookErr)
}

// joinIndexed counts the indexed clicks, refuses duplicates, and joins
// the conversions the clicks claimed from the orphan buffer.
func (g *genState) joinIndexed(ctx context.Context, cfg Config, j *joined, indexed []clickEvent, put []state.ClickResult) error {
	s := g.s
	for i, r := range put {
		ce := indexed[i]
		e := g.exps[ce.c.Experiment]
		if r.Status == state.ClickDuplicate {
			j.refuse(s, ce.org, reject(ReasonDuplicateClick, "click_id %q already seen (%s)", ce.c.ClickID, r.Existing.Origin))
			continue
		}
		j.events = append(j.events, joinedEvent{e: e, arm: ce.c.Arm, tp: ce.m.tp, offset: ce.m.offset, origin: ce.org, clickTS: ce.c.TS})
		o := r.Orphan
		if o == nil {
			continue
		}
		j.raw[o.Origin] = o.Raw
		v, err := DecodeConversion(o.Raw)
		var rej *RejectError
		if errors.As(err, &rej) {
			j.refuse(s, o.Origin, rej)
			continue
		}
		if rej := checkJoin(v, ce.c.Experiment, ce.c.Arm, ce.c.TS, e.windowMs); rej != nil {
			j.refuse(s, o.Origin, rej)
			continue
		}
		j.events = append(j.events, joinedEvent{e: e, arm: ce.c.Arm, tp: ce.m.tp, offset: ce.m.offset, origin: o.Origin, clickTS: ce.c.TS, conv: true, clickID: o.ClickID, convTS: v.TS})
	}
	return nil
}

// joinSameBatch joins the conversions (same: indices in convs) whose
// click is one of the batch's indexed records, from the index's answer
// for the record: the click itself, or the one that held its id before.
func (g *genState) joinSameBatch(ctx context.Context, cfg Config, j *joined, convs []convEvent, same []int, records []state.ClickRecord, put []state.ClickResult) error {
	if len(same) == 0 {
		return nil
	}
	holder := make(map[string]state.LookupResult, len(records))
	for i, r := range records {
		if _, ok := holder[r.ClickID]; ok {
			continue // the first record of an id holds it
		}
		c := state.ClickEntry{Experiment: r.Experiment, Arm: r.Arm, TS: r.TS, Origin: r.Origin}
		if put[i].Status == state.ClickDuplicate {
			c = put[i].Existing
		}
		holder[r.ClickID] = state.LookupResult{Status: state.LookupFound, Click: c}
	}
	for _, i := range same {
		if err := g.joinLookedUp(ctx, cfg, j, convs[i], holder[convs[i].v.ClickID]); err != nil {
			return err
		}
	}
	return nil
}

// joinLookedUp handles a conversion by what the index said of its click.
func (g *genState) joinLookedUp(ctx context.Context, cfg Config, j *joined, cv convEvent, r state.LookupResult) error {
	s := g.s
	switch r.Status {
	case state.LookupFound:
		e, rej, err := g.experiment(ctx, cfg, r.Click.Experiment, r.Click.Arm)
		if err != nil {
			return err
		}
		if rej != nil {
			j.refuse(s, cv.org, rej)
			return nil
		}
		if e.seen(cv.m.tp, cv.m.offset) {
			return nil
		}
		j.touched = append(j.touched, e)
		if rej := checkJoin(cv.v, r.Click.Experiment, r.Click.Arm, r.Click.TS, e.windowMs); rej != nil {
			j.refuse(s, cv.org, rej)
			return nil
		}
		j.events = append(j.events, joinedEvent{e: e, arm: r.Click.Arm, tp: cv.m.tp, offset: cv.m.offset, origin: cv.org, clickTS: r.Click.TS, conv: true, clickID: cv.v.ClickID, convTS: cv.v.TS})
	case state.LookupParked:
		// Joined when the click comes, or settled by the sweep.
		if s.metrics != nil {
			s.metrics.OrphansParked.Inc()
		}
	case state.LookupParkedBefore:
		// A redelivery of a conversion already parked.
	case state.LookupDuplicate:
		j.refuse(s, cv.org, reject(ReasonDuplicateConversion, "click %q already has a conversion waiting for it (%s)", cv.v.ClickID, r.Origin))
	case state.LookupCapExceeded:
		j.refuse(s, cv.org, reject(ReasonCapExceeded, "partition %s has limits.max_orphans_per_partition conversions waiting for their clicks", cv.m.tp))
	default:
		return fmt.Errorf("lookup conversion %s: unexpected status %v", cv.org, r.Status)
	}
	return nil
}
