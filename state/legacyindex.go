package state

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"strconv"

	"github.com/redis/go-redis/v9"
)

// The first layout of the click index kept one key per click,
// <p>:{k:<click>}:c (a string: the entry of encodeClick, with a TTL of
// window + ClickTTLSlack), and parked a conversion in <p>:{k:<click>}:o (a
// hash: s state, org origin, ts, dl deadline, tp topic, pt partition, raw
// bytes; with the orphan TTL). When the second layout's descriptor is
// created over a prefix that holds experiments, it records a legacy
// bound: the latest event time the input partitions reported plus the
// horizon and ClickTTLSlack. Up to that event time the index also reads
// the first layout: a conversion missing from the generations looks for
// its click's old entry, a click checks for an old entry with its id
// (the same click read again is a redelivery, another one a duplicate)
// and takes the conversion parked for it there, and the orphan sweep
// settles old orphans from their due entries as before. Nothing is
// written in the first layout; its keys expire by their TTLs, and the
// retirement clears the bound once the watermark has passed it plus the
// orphan TTL. Instances of the first layout must be stopped before the
// upgrade: they do not see the second layout.

// legacyBound reads the descriptor's legacy bound: NoTime when there is
// none, or no descriptor (the index is not created by this read).
func (s *Store) legacyBound(ctx context.Context) (int64, error) {
	v, err := s.rdb.HGet(ctx, s.keys.indexMeta(), "legacy").Result()
	switch {
	case errors.Is(err, redis.Nil):
		return NoTime, nil
	case err != nil:
		return 0, redisFailure("click index", err)
	}
	b, err := parseInt(v)
	if err != nil {
		return 0, permanent("click index", err)
	}
	return b, nil
}

// legacyActive reports whether a click or conversion at ts may meet the
// first layout's keys.
func (v indexView) legacyActive(ts int64) bool {
	return v.legacy != NoTime && ts <= v.legacy
}

// legacyGets queues a GET of the first layout's entry of every click the
// bound covers.
func (w *clickWrite) legacyGets(ctx context.Context, pipe redis.Pipeliner) {
	for k := range w.todo {
		p := &w.todo[k]
		if c := w.clicks[p.i]; w.v.legacyActive(c.TS) {
			p.legacyGet = pipe.Get(ctx, w.s.keys.legacyClick(c.ClickID))
		}
	}
}

// legacyDuplicates settles the clicks whose id the first layout holds: a
// redelivery when the old entry is this click, else a duplicate.
func (w *clickWrite) legacyDuplicates() error {
	for k := range w.todo {
		p := &w.todo[k]
		if p.legacyGet == nil {
			continue
		}
		b, err := p.legacyGet.Bytes()
		if errors.Is(err, redis.Nil) {
			continue
		}
		if err != nil {
			return err
		}
		c := w.clicks[p.i]
		e, err := decodeClick(b)
		if err != nil {
			return fmt.Errorf("click %q: %w", c.ClickID, err)
		}
		p.settled = true
		if e == (ClickEntry{Experiment: c.Experiment, Arm: c.Arm, TS: c.TS, Origin: c.Origin}) {
			w.out[p.i].Status = ClickRedelivered
			continue
		}
		w.out[p.i] = ClickResult{Status: ClickDuplicate, Existing: e}
	}
	return nil
}

// legacyOrphanChecks queues an EXISTS of the first layout's orphan of
// every click the bound covers that is not a duplicate.
func (w *clickWrite) legacyOrphanChecks(ctx context.Context, pipe redis.Pipeliner) {
	for k := range w.todo {
		p := &w.todo[k]
		if c := w.clicks[p.i]; w.v.legacyActive(c.TS) && w.out[p.i].Status != ClickDuplicate {
			p.legacyOrphan = pipe.Exists(ctx, w.s.keys.legacyOrphan(c.ClickID))
		}
	}
}

// legacyClaims takes the first layout's orphans of the clicks indexed now
// (see legacy_claim.lua).
func (w *clickWrite) legacyClaims(ctx context.Context) error {
	var ks []int
	var calls []scriptCall
	for k, p := range w.todo {
		if p.legacyOrphan == nil || p.legacyOrphan.Val() == 0 || w.out[p.i].Status == ClickDuplicate {
			continue
		}
		ks = append(ks, k)
		calls = append(calls, scriptCall{keys: []string{w.s.keys.legacyOrphan(w.clicks[p.i].ClickID)}})
	}
	if len(calls) == 0 {
		return nil
	}
	cmds, err := runPipelined(ctx, w.s.rdb, legacyClaimScript, calls)
	if err != nil {
		return redisFailure("put clicks", fmt.Errorf("%d old orphan claims: %w", len(calls), err))
	}
	for j, cmd := range cmds {
		p := w.todo[ks[j]]
		r, _ := cmd.Val().([]any)
		if len(r) == 0 {
			continue
		}
		o, err := parseLegacyOrphanReply(w.clicks[p.i].ClickID, r[0])
		if err != nil {
			return permanent("put clicks", err)
		}
		w.out[p.i].Orphan = &o
	}
	return nil
}

// legacyReads are the first layout's entries a lookup read.
type legacyReads struct {
	gets map[int]*redis.StringCmd
}

// legacyLookups queues a GET of the first layout's entry of every
// conversion the bound covers.
func (s *Store) legacyLookups(ctx context.Context, pipe redis.Pipeliner, v indexView, convs []ConversionLookup) legacyReads {
	r := legacyReads{gets: map[int]*redis.StringCmd{}}
	for i, c := range convs {
		if v.legacyActive(c.TS) {
			r.gets[i] = pipe.Get(ctx, s.keys.legacyClick(c.ClickID))
		}
	}
	return r
}

// found fills in the conversions whose click only the first layout holds.
func (r legacyReads) found(results []LookupResult) error {
	for i, g := range r.gets {
		if results[i].Status == LookupFound {
			continue
		}
		b, err := g.Bytes()
		if errors.Is(err, redis.Nil) {
			continue
		}
		if err != nil {
			return err
		}
		e, err := decodeClick(b)
		if err != nil {
			return err
		}
		results[i] = LookupResult{Status: LookupFound, Click: e}
	}
	return nil
}

// legacySweep runs the first layout's sweep for the due entries whose
// orphan the second layout does not hold (the indices gone of ids), and
// puts its replies in replies.
func (s *Store) legacySweep(ctx context.Context, topic string, partition int, watermark int64, sweeper string, ids []string, gone []int, replies [][]any) error {
	if len(gone) == 0 {
		return nil
	}
	calls := make([]scriptCall, len(gone))
	for j, i := range gone {
		calls[j] = scriptCall{keys: []string{s.keys.legacyOrphan(ids[i])}, args: []any{topic, partition, watermark, sweeper}}
	}
	cmds, err := runPipelined(ctx, s.rdb, legacySweepScript, calls)
	if err != nil {
		return redisFailure("due orphans", fmt.Errorf("%s/%d: old orphans: %w", topic, partition, err))
	}
	for j, i := range gone {
		replies[i], _ = cmds[j].Val().([]any)
	}
	return nil
}

// parseLegacyOrphanReply reads an orphan hash of the first layout, given
// as a flat field/value array.
func parseLegacyOrphanReply(clickID string, v any) (Orphan, error) {
	h, err := flatHash(v)
	if err != nil {
		return Orphan{}, fmt.Errorf("orphan %q: %w", clickID, err)
	}
	return parseOrphan(clickID, h)
}

// parseOrphan reads an orphan hash (fields s, org, ts, dl, tp, pt, raw).
func parseOrphan(clickID string, h map[string]string) (Orphan, error) {
	ts, err1 := parseInt(h["ts"])
	dl, err2 := parseInt(h["dl"])
	pt, err3 := strconv.Atoi(h["pt"])
	if err1 != nil || err2 != nil || err3 != nil || h["org"] == "" {
		return Orphan{}, fmt.Errorf("%w: orphan fields %v", ErrCorrupt, h)
	}
	return Orphan{
		ClickID: clickID, TS: ts, Origin: h["org"], Topic: h["tp"], Partition: pt,
		Deadline: dl, Raw: []byte(h["raw"]), Claimed: h["s"] == "c",
	}, nil
}

// encodeClick writes a click index entry: uvarint length + experiment,
// uvarint length + arm, varint click time, then, if the origin is known,
// uvarint length + origin.
func encodeClick(e ClickEntry) []byte {
	b := make([]byte, 0, len(e.Experiment)+len(e.Arm)+len(e.Origin)+14)
	b = binary.AppendUvarint(b, uint64(len(e.Experiment)))
	b = append(b, e.Experiment...)
	b = binary.AppendUvarint(b, uint64(len(e.Arm)))
	b = append(b, e.Arm...)
	b = binary.AppendVarint(b, e.TS)
	if e.Origin != "" {
		b = binary.AppendUvarint(b, uint64(len(e.Origin)))
		b = append(b, e.Origin...)
	}
	return b
}

// decodeClick reads encodeClick's output.
func decodeClick(b []byte) (ClickEntry, error) {
	rest := b
	str := func() (string, bool) {
		n, k := binary.Uvarint(rest)
		if k <= 0 || uint64(len(rest)-k) < n {
			return "", false
		}
		s := string(rest[k : k+int(n)])
		rest = rest[k+int(n):]
		return s, true
	}
	exp, ok1 := str()
	arm, ok2 := str()
	ts, k := binary.Varint(rest)
	if !ok1 || !ok2 || k <= 0 {
		return ClickEntry{}, fmt.Errorf("%w: click entry %q", ErrCorrupt, b)
	}
	rest = rest[k:]
	var org string
	if len(rest) > 0 {
		var ok bool
		if org, ok = str(); !ok || len(rest) != 0 || org == "" {
			return ClickEntry{}, fmt.Errorf("%w: click entry %q", ErrCorrupt, b)
		}
	}
	return ClickEntry{Experiment: exp, Arm: arm, TS: ts, Origin: org}, nil
}
