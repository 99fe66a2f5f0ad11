package state

import (
	"context"
	"encoding/binary"
	"fmt"
	"strconv"
	"time"

	"github.com/redis/go-redis/v9"
)

// ClickRecord is a click to put in the click index.
type ClickRecord struct {
	// ClickID identifies the click.
	ClickID string
	// Experiment and Arm are where the click was served.
	Experiment, Arm string
	// TS is the click time (Unix ms).
	TS int64
	// Window is the experiment's attribution window; the entry lives for
	// Window + Options.ClickTTLSlack.
	Window time.Duration
}

// ClickEntry is what the click index knows about a click.
type ClickEntry struct {
	// Experiment and Arm are where the click was served.
	Experiment, Arm string
	// TS is the click time (Unix ms).
	TS int64
}

// Orphan is a conversion that arrived before its click and was parked.
type Orphan struct {
	// ClickID is the click the conversion belongs to.
	ClickID string
	// TS is the conversion time (Unix ms).
	TS int64
	// Origin is where the conversion was read, "<topic>/<partition>/<offset>".
	Origin string
	// Topic and Partition are the conversion partition that parked it.
	Topic     string
	Partition int
	// Deadline is the event time after which it expires unjoined.
	Deadline int64
	// Raw is the conversion's original bytes, for joining or dead-lettering.
	Raw []byte
	// Claimed is true if it had been taken by a click before (a redelivered
	// click takes it again; the conversion marker keeps it from counting
	// twice).
	Claimed bool
}

// ConversionLookup is a conversion to join to its click.
type ConversionLookup struct {
	// ClickID is the click the conversion names.
	ClickID string
	// TS is the conversion time (Unix ms).
	TS int64
	// Origin is where the conversion was read, "<topic>/<partition>/<offset>".
	Origin string
	// Raw is the conversion's original bytes, kept if it is parked.
	Raw []byte
	// Topic and Partition are the conversion's partition, whose due set
	// and orphan cap a parked conversion counts against.
	Topic     string
	Partition int
	// Deadline is the event time (Unix ms) after which a parked conversion
	// whose click never came is returned by DueOrphans.
	Deadline int64
}

// LookupStatus is the outcome of one conversion lookup.
type LookupStatus int

// Lookup outcomes.
const (
	// LookupFound: the click is indexed; LookupResult.Click is set.
	LookupFound LookupStatus = iota + 1
	// LookupParked: the click is unknown; the conversion was parked.
	LookupParked
	// LookupParkedBefore: this very conversion (same origin) was parked
	// before, a redelivery; LookupResult.Claimed says whether its click
	// has taken it since.
	LookupParkedBefore
	// LookupDuplicate: another conversion of the same click is parked;
	// LookupResult.Origin is its origin.
	LookupDuplicate
	// LookupCapExceeded: the click is unknown and the partition has
	// Options.MaxParkedOrphans orphans parked; nothing was stored.
	LookupCapExceeded
)

// String names the status.
func (s LookupStatus) String() string {
	switch s {
	case LookupFound:
		return "found"
	case LookupParked:
		return "parked"
	case LookupParkedBefore:
		return "parked_before"
	case LookupDuplicate:
		return "duplicate"
	case LookupCapExceeded:
		return "cap_exceeded"
	}
	return "LookupStatus(" + strconv.Itoa(int(s)) + ")"
}

// LookupResult is the outcome of one ConversionLookup.
type LookupResult struct {
	Status LookupStatus
	// Click is the click, when Status is LookupFound.
	Click ClickEntry
	// Origin is the parked conversion's origin, when Status is
	// LookupDuplicate.
	Origin string
	// Claimed is set with LookupParkedBefore.
	Claimed bool
}

// PutClicks indexes clicks (one atomic script per click, all in one
// pipeline) and returns the orphan conversions that were parked waiting for
// them, now claimed, for the caller to join.
func (s *Store) PutClicks(ctx context.Context, clicks []ClickRecord) ([]Orphan, error) {
	const op = "put clicks"
	if len(clicks) == 0 {
		return nil, nil
	}
	calls := make([]scriptCall, len(clicks))
	for i, c := range clicks {
		if c.ClickID == "" || c.Arm == "" || c.Window <= 0 {
			return nil, permanent(op, fmt.Errorf("%w: click %q on arm %q with window %v", ErrInvalid, c.ClickID, c.Arm, c.Window))
		}
		if err := validExperiment(c.Experiment); err != nil {
			return nil, permanent(op, fmt.Errorf("click %q: %w", c.ClickID, err))
		}
		ttl := (c.Window + s.opts.ClickTTLSlack).Milliseconds()
		calls[i] = scriptCall{
			keys: []string{s.keys.click(c.ClickID), s.keys.orphan(c.ClickID)},
			args: []any{encodeClick(ClickEntry{Experiment: c.Experiment, Arm: c.Arm, TS: c.TS}), ttl},
		}
	}
	cmds, err := runPipelined(ctx, s.rdb, putClickScript, calls)
	if err != nil {
		return nil, redisFailure(op, fmt.Errorf("%d clicks: %w", len(clicks), err))
	}
	var orphans []Orphan
	for i, cmd := range cmds {
		v, _ := cmd.Val().([]any)
		if v == nil {
			continue // 0: nothing parked
		}
		h, err := flatHash(v)
		if err != nil {
			return nil, permanent(op, fmt.Errorf("click %q: orphan: %w", clicks[i].ClickID, err))
		}
		o, err := parseOrphan(clicks[i].ClickID, h)
		if err != nil {
			return nil, permanent(op, fmt.Errorf("click %q: %w", clicks[i].ClickID, err))
		}
		orphans = append(orphans, o)
	}
	return orphans, nil
}

// LookupConversions joins each conversion to its indexed click or parks it
// as an orphan until the click arrives, atomically per conversion (one
// script per conversion, pipelined), and adds parked ones to their
// partition's due set.
//
// The orphan cap is checked per partition before the batch: of a batch, at
// most as many conversions as the partition has room for may park, in
// batch order, so the cap is never exceeded by more than concurrent
// writers to the same partition add (normally none: one consumer owns it).
func (s *Store) LookupConversions(ctx context.Context, convs []ConversionLookup) ([]LookupResult, error) {
	const op = "lookup conversions"
	if len(convs) == 0 {
		return nil, nil
	}
	// Room per partition.
	type part struct {
		topic string
		p     int
	}
	room := map[part]int64{}
	var parts []part
	for _, c := range convs {
		if c.ClickID == "" || c.Origin == "" {
			return nil, permanent(op, fmt.Errorf("%w: conversion of click %q from %q", ErrInvalid, c.ClickID, c.Origin))
		}
		if err := validPartition(c.Topic, c.Partition); err != nil {
			return nil, permanent(op, err)
		}
		k := part{c.Topic, c.Partition}
		if _, ok := room[k]; !ok {
			room[k] = 0
			parts = append(parts, k)
		}
	}
	pipe := s.rdb.Pipeline()
	cards := make([]*redis.IntCmd, len(parts))
	for i, p := range parts {
		cards[i] = pipe.ZCard(ctx, s.keys.due(p.topic, p.p))
	}
	if _, err := pipe.Exec(ctx); err != nil {
		return nil, redisFailure(op, fmt.Errorf("orphan counts: %w", err))
	}
	for i, p := range parts {
		room[p] = int64(s.opts.MaxParkedOrphans) - cards[i].Val()
	}

	ttl := s.opts.OrphanTTL.Milliseconds()
	calls := make([]scriptCall, len(convs))
	for i, c := range convs {
		k := part{c.Topic, c.Partition}
		allow := "0"
		if room[k] > 0 {
			allow = "1"
			room[k]--
		}
		calls[i] = scriptCall{
			keys: []string{s.keys.click(c.ClickID), s.keys.orphan(c.ClickID)},
			args: []any{allow, ttl, c.Origin, c.TS, c.Deadline, c.Topic, c.Partition, c.Raw},
		}
	}
	cmds, err := runPipelined(ctx, s.rdb, lookupScript, calls)
	if err != nil {
		return nil, redisFailure(op, fmt.Errorf("%d conversions: %w", len(convs), err))
	}
	results := make([]LookupResult, len(convs))
	pipe = s.rdb.Pipeline()
	due := 0
	for i, cmd := range cmds {
		v, _ := cmd.Val().([]any)
		status := ""
		if len(v) > 0 {
			status, _ = v[0].(string)
		}
		arg := ""
		if len(v) > 1 {
			arg, _ = v[1].(string)
		}
		c := convs[i]
		switch status {
		case "found":
			e, err := decodeClick([]byte(arg))
			if err != nil {
				return nil, permanent(op, fmt.Errorf("click %q: %w", c.ClickID, err))
			}
			results[i] = LookupResult{Status: LookupFound, Click: e}
		case "parked":
			results[i] = LookupResult{Status: LookupParked}
		case "again":
			results[i] = LookupResult{Status: LookupParkedBefore, Claimed: arg == "c"}
		case "duplicate":
			results[i] = LookupResult{Status: LookupDuplicate, Origin: arg}
			continue
		case "cap":
			results[i] = LookupResult{Status: LookupCapExceeded}
			continue
		default:
			return nil, permanent(op, fmt.Errorf("click %q: %w: lookup status %q", c.ClickID, ErrCorrupt, status))
		}
		if results[i].Status == LookupParked || (results[i].Status == LookupParkedBefore && !results[i].Claimed) {
			// NX: a redelivery after a crash between parking and this
			// step re-adds the entry; an existing one keeps its deadline.
			pipe.ZAddNX(ctx, s.keys.due(c.Topic, c.Partition), redis.Z{Score: float64(c.Deadline), Member: c.ClickID})
			due++
		}
	}
	if due > 0 {
		if _, err := pipe.Exec(ctx); err != nil {
			return nil, redisFailure(op, fmt.Errorf("due set: %w", err))
		}
	}
	return results, nil
}

// dueBatch is how many due entries DueOrphans settles per round trip.
const dueBatch = 500

// DueOrphans settles the orphans parked by topic/partition whose deadline is
// at or before watermark: it returns (and deletes) those still unclaimed,
// for dead-lettering, and deletes the claimed ones.
func (s *Store) DueOrphans(ctx context.Context, topic string, partition int, watermark int64) ([]Orphan, error) {
	const op = "due orphans"
	if err := validPartition(topic, partition); err != nil {
		return nil, permanent(op, err)
	}
	dkey := s.keys.due(topic, partition)
	upto := strconv.FormatInt(watermark, 10)
	var out []Orphan
	// Every round removes each entry it reads from the score range (it is
	// settled, or moved to its later deadline), so rounds end; the bound
	// only guards against a writer racing the sweep, and what is left is
	// settled by the next call.
	maxRounds := 2*s.opts.MaxParkedOrphans/dueBatch + 4
	for range maxRounds {
		ids, err := s.rdb.ZRangeArgs(ctx, redis.ZRangeArgs{
			Key: dkey, Start: "-inf", Stop: upto, ByScore: true, Count: dueBatch,
		}).Result()
		if err != nil {
			return out, redisFailure(op, fmt.Errorf("%s/%d: %w", topic, partition, err))
		}
		if len(ids) == 0 {
			return out, nil
		}
		calls := make([]scriptCall, len(ids))
		for i, id := range ids {
			calls[i] = scriptCall{keys: []string{s.keys.orphan(id)}, args: []any{topic, partition, watermark}}
		}
		cmds, err := runPipelined(ctx, s.rdb, sweepScript, calls)
		if err != nil {
			return out, redisFailure(op, fmt.Errorf("%s/%d: %w", topic, partition, err))
		}
		var settled []any
		pipe := s.rdb.Pipeline()
		for i, cmd := range cmds {
			v, _ := cmd.Val().([]any)
			status := ""
			if len(v) > 0 {
				status, _ = v[0].(string)
			}
			switch status {
			case "gone", "other", "claimed":
				settled = append(settled, ids[i])
			case "later":
				str, _ := v[1].(string)
				dl, err := parseInt(str)
				if err != nil {
					return out, permanent(op, fmt.Errorf("orphan %q deadline: %w", ids[i], err))
				}
				pipe.ZAddXX(ctx, dkey, redis.Z{Score: float64(dl), Member: ids[i]})
			case "expired":
				h, err := flatHash(v[1])
				if err != nil {
					return out, permanent(op, fmt.Errorf("orphan %q: %w", ids[i], err))
				}
				o, err := parseOrphan(ids[i], h)
				if err != nil {
					return out, permanent(op, fmt.Errorf("orphan %q: %w", ids[i], err))
				}
				out = append(out, o)
				settled = append(settled, ids[i])
			default:
				return out, permanent(op, fmt.Errorf("orphan %q: %w: sweep status %q", ids[i], ErrCorrupt, status))
			}
		}
		if len(settled) > 0 {
			pipe.ZRem(ctx, dkey, settled...)
		}
		if _, err := pipe.Exec(ctx); err != nil {
			return out, redisFailure(op, fmt.Errorf("%s/%d: settle: %w", topic, partition, err))
		}
		if len(ids) < dueBatch {
			return out, nil
		}
	}
	return out, nil
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
// uvarint length + arm, varint click time.
func encodeClick(e ClickEntry) []byte {
	b := make([]byte, 0, len(e.Experiment)+len(e.Arm)+12)
	b = binary.AppendUvarint(b, uint64(len(e.Experiment)))
	b = append(b, e.Experiment...)
	b = binary.AppendUvarint(b, uint64(len(e.Arm)))
	b = append(b, e.Arm...)
	return binary.AppendVarint(b, e.TS)
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
	if !ok1 || !ok2 || k <= 0 || k != len(rest) {
		return ClickEntry{}, fmt.Errorf("%w: click entry %q", ErrCorrupt, b)
	}
	return ClickEntry{Experiment: exp, Arm: arm, TS: ts}, nil
}
