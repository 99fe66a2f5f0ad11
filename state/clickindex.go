package state

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/fnv"
	"slices"
	"strconv"
	"sync"
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
	// Origin is where the click was read, "<topic>/<partition>/<offset>";
	// it tells a redelivery (same origin) from a duplicate click id.
	// Default: "" (then identical records count as redeliveries).
	Origin string
}

// ClickEntry is what the click index knows about a click.
type ClickEntry struct {
	// Experiment and Arm are where the click was served.
	Experiment, Arm string
	// TS is the click time (Unix ms).
	TS int64
	// Origin is where the indexed click was read ("" if not recorded).
	Origin string
}

// ClickStatus is the outcome of indexing one click.
type ClickStatus int

// Click index outcomes.
const (
	// ClickNew: the click was indexed now.
	ClickNew ClickStatus = iota + 1
	// ClickRedelivered: the same click (same origin and content) was
	// indexed before; it counts as the first copy did.
	ClickRedelivered
	// ClickDuplicate: another click holds the id; nothing was stored and
	// ClickResult.Existing says which click that is.
	ClickDuplicate
)

// String names the status.
func (s ClickStatus) String() string {
	switch s {
	case ClickNew:
		return "new"
	case ClickRedelivered:
		return "redelivered"
	case ClickDuplicate:
		return "duplicate"
	}
	return "ClickStatus(" + strconv.Itoa(int(s)) + ")"
}

// ClickResult is the outcome of indexing one ClickRecord.
type ClickResult struct {
	Status ClickStatus
	// Existing is the click that holds the id, with ClickDuplicate.
	Existing ClickEntry
	// Orphan is the conversion that was parked waiting for the click, now
	// claimed (nil if none, and always nil with ClickDuplicate).
	Orphan *Orphan
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

// PutClicks indexes clicks like IndexClicks and returns the orphan
// conversions that were parked waiting for the clicks it indexed (new or
// redelivered), now claimed, for the caller to join.
func (s *Store) PutClicks(ctx context.Context, clicks []ClickRecord) ([]Orphan, error) {
	res, err := s.IndexClicks(ctx, clicks)
	if err != nil {
		return nil, err
	}
	var orphans []Orphan
	for _, r := range res {
		if r.Orphan != nil {
			orphans = append(orphans, *r.Orphan)
		}
	}
	return orphans, nil
}

// clickShards and clickShardMin bound how IndexClicks splits a batch: at
// most clickShards pipelines at once, each of at least clickShardMin
// clicks.
const (
	clickShards   = 4
	clickShardMin = 1000
)

// IndexClicks indexes clicks, pipelined, in order per click id. A click id is
// indexed once (SET NX): a later click with the same id from another
// origin is reported as ClickDuplicate and changes nothing, the same click
// read again is ClickRedelivered. The conversion parked waiting for an
// indexed click is claimed and returned with it.
//
// Each click costs two plain commands on its slot, `SET entry NX GET PX
// ttl` (new, or the entry that holds the id) and then `EXISTS orphan`; only
// a click with an orphan runs putclick.lua, which claims it. No join is
// lost when an instance parks the click's conversion at the same moment:
// lookup.lua checks for the entry and parks atomically, and this
// connection's SET runs before its EXISTS, so either the lookup ran
// before the SET (then the orphan exists when EXISTS runs, and is claimed
// here) or after it (then the lookup found the click and parked nothing).
// Nor is one joined twice: a conversion found by its lookup is never
// parked, and a claimed orphan is marked so (the experiment's conversion
// marker dedupes a claim repeated by a redelivered click).
func (s *Store) IndexClicks(ctx context.Context, clicks []ClickRecord) ([]ClickResult, error) {
	const op = "put clicks"
	if len(clicks) == 0 {
		return nil, nil
	}
	entries := make([][]byte, len(clicks))
	ttls := make([]int64, len(clicks))
	for i, c := range clicks {
		if c.ClickID == "" || c.Arm == "" || c.Window <= 0 {
			return nil, permanent(op, fmt.Errorf("%w: click %q on arm %q with window %v", ErrInvalid, c.ClickID, c.Arm, c.Window))
		}
		if err := validExperiment(c.Experiment); err != nil {
			return nil, permanent(op, fmt.Errorf("click %q: %w", c.ClickID, err))
		}
		entries[i] = encodeClick(ClickEntry{Experiment: c.Experiment, Arm: c.Arm, TS: c.TS, Origin: c.Origin})
		ttls[i] = (c.Window + s.opts.ClickTTLSlack).Milliseconds()
	}
	sets := make([]*redis.Cmd, len(clicks))
	exists := make([]*redis.IntCmd, len(clicks))
	// A large batch is sent as a few pipelines at once, so that encoding
	// and decoding overlap the server's work; clicks are split by id, so
	// the clicks of one id stay in one pipeline, in batch order.
	shards := 1
	if len(clicks) >= 2*clickShardMin {
		shards = min(clickShards, len(clicks)/clickShardMin)
	}
	idx := make([][]int, shards)
	for i, c := range clicks {
		k := 0
		if shards > 1 {
			h := fnv.New32a()
			h.Write([]byte(c.ClickID))
			k = int(h.Sum32() % uint32(shards))
		}
		idx[k] = append(idx[k], i)
	}
	errs := make([]error, shards)
	var wg sync.WaitGroup
	for k := range shards {
		wg.Add(1)
		go func() {
			defer wg.Done()
			pipe := s.rdb.Pipeline()
			for _, i := range idx[k] {
				id := clicks[i].ClickID
				sets[i] = pipe.Do(ctx, "set", s.keys.click(id), entries[i], "nx", "get", "px", ttls[i])
				exists[i] = pipe.Exists(ctx, s.keys.orphan(id))
			}
			if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
				errs[k] = err
			}
		}()
	}
	wg.Wait()
	if err := errors.Join(errs...); err != nil {
		return nil, redisFailure(op, fmt.Errorf("%d clicks: %w", len(clicks), err))
	}
	out := make([]ClickResult, len(clicks))
	var claim []int
	for i, c := range clicks {
		prev, err := sets[i].Text()
		switch {
		case errors.Is(err, redis.Nil):
			out[i].Status = ClickNew
		case err != nil:
			return nil, redisFailure(op, fmt.Errorf("click %q: %w", c.ClickID, err))
		case prev == string(entries[i]):
			out[i].Status = ClickRedelivered
		default:
			e, err := decodeClick([]byte(prev))
			if err != nil {
				return nil, permanent(op, fmt.Errorf("click %q: %w", c.ClickID, err))
			}
			out[i] = ClickResult{Status: ClickDuplicate, Existing: e}
			continue
		}
		n, err := exists[i].Result()
		if err != nil {
			return nil, redisFailure(op, fmt.Errorf("click %q: orphan: %w", c.ClickID, err))
		}
		if n > 0 {
			claim = append(claim, i)
		}
	}
	if len(claim) == 0 {
		return out, nil
	}
	// The rare clicks whose conversion came first: claim the orphan.
	calls := make([]scriptCall, len(claim))
	for j, i := range claim {
		c := clicks[i]
		calls[j] = scriptCall{
			keys: []string{s.keys.click(c.ClickID), s.keys.orphan(c.ClickID)},
			args: []any{entries[i], ttls[i]},
		}
	}
	cmds, err := runPipelined(ctx, s.rdb, putClickScript, calls)
	if err != nil {
		return nil, redisFailure(op, fmt.Errorf("%d orphan claims: %w", len(calls), err))
	}
	for j, cmd := range cmds {
		i := claim[j]
		id := clicks[i].ClickID
		v, _ := cmd.Val().([]any)
		status := ""
		if len(v) > 0 {
			status, _ = v[0].(string)
		}
		// The entry was stored above, so the script sees it as "again";
		// anything else means another click took the id meanwhile,
		// which SET NX rules out (an entry lives out its TTL).
		if status != "again" && status != "new" {
			return nil, permanent(op, fmt.Errorf("click %q: %w: claim status %q", id, ErrCorrupt, status))
		}
		if len(v) < 2 {
			continue // the sweep is expiring it, or it went away
		}
		h, err := flatHash(v[1])
		if err != nil {
			return nil, permanent(op, fmt.Errorf("click %q: orphan: %w", id, err))
		}
		o, err := parseOrphan(id, h)
		if err != nil {
			return nil, permanent(op, fmt.Errorf("click %q: %w", id, err))
		}
		out[i].Orphan = &o
	}
	return out, nil
}

// LookupConversions joins each conversion to its indexed click or parks it
// as an orphan until the click arrives, and adds parked ones to their
// partition's due set.
//
// It first reads every conversion's click entry (plain GETs, pipelined):
// an indexed click is only ever removed by its TTL, so a conversion whose
// click is found is joined without a script. Only the others go through
// the lookup script, which checks for the click again and parks the
// conversion atomically with putclick.lua's claim (same slot), so a click
// and its conversion consumed at the same moment by two instances are
// joined exactly once.
//
// The orphan cap is checked per partition before the scripts: of the
// conversions whose click is unknown, at most as many as the partition has
// room for may park, in batch order; only a conversion that parks uses
// room (one that finds its click in the script after all, or was parked
// before, gives its share to the next), so the cap is never exceeded by
// more than concurrent writers to the same partition add (normally none:
// one consumer owns it).
func (s *Store) LookupConversions(ctx context.Context, convs []ConversionLookup) ([]LookupResult, error) {
	const op = "lookup conversions"
	if len(convs) == 0 {
		return nil, nil
	}
	for _, c := range convs {
		if c.ClickID == "" || c.Origin == "" {
			return nil, permanent(op, fmt.Errorf("%w: conversion of click %q from %q", ErrInvalid, c.ClickID, c.Origin))
		}
		if err := validPartition(c.Topic, c.Partition); err != nil {
			return nil, permanent(op, err)
		}
	}
	results := make([]LookupResult, len(convs))

	// Phase 1: the clicks already indexed.
	pipe := s.rdb.Pipeline()
	gets := make([]*redis.StringCmd, len(convs))
	for i, c := range convs {
		gets[i] = pipe.Get(ctx, s.keys.click(c.ClickID))
	}
	if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
		return nil, redisFailure(op, fmt.Errorf("%d click entries: %w", len(convs), err))
	}
	type part struct {
		topic string
		p     int
	}
	var pending []int // conversions whose click is unknown, in batch order
	var parts []part
	for i, g := range gets {
		b, err := g.Bytes()
		switch {
		case errors.Is(err, redis.Nil):
			c := convs[i]
			pending = append(pending, i)
			if k := (part{c.Topic, c.Partition}); !slices.Contains(parts, k) {
				parts = append(parts, k)
			}
			continue
		case err != nil:
			return nil, redisFailure(op, fmt.Errorf("click %q: %w", convs[i].ClickID, err))
		}
		e, err := decodeClick(b)
		if err != nil {
			return nil, permanent(op, fmt.Errorf("click %q: %w", convs[i].ClickID, err))
		}
		results[i] = LookupResult{Status: LookupFound, Click: e}
	}
	if len(pending) == 0 {
		return results, nil
	}

	// Phase 2: look up or park the others, within each partition's room.
	pipe = s.rdb.Pipeline()
	cards := make([]*redis.IntCmd, len(parts))
	for i, p := range parts {
		cards[i] = pipe.ZCard(ctx, s.keys.due(p.topic, p.p))
	}
	if _, err := pipe.Exec(ctx); err != nil {
		return nil, redisFailure(op, fmt.Errorf("orphan counts: %w", err))
	}
	room := make(map[part]int64, len(parts))
	for i, p := range parts {
		room[p] = int64(s.opts.MaxParkedOrphans) - cards[i].Val()
	}
	ttl := s.opts.OrphanTTL.Milliseconds()
	// Each round settles every conversion allowed to park (it parks, or
	// finds its click after all, or was parked before, or is a
	// duplicate); a share of room not used that way goes back, and the
	// conversions refused in the round for want of room try again. Every
	// round that allows one settles it, so rounds end.
	for len(pending) > 0 {
		allowed := make([]bool, len(pending))
		calls := make([]scriptCall, len(pending))
		progress := false
		for j, i := range pending {
			c := convs[i]
			k := part{c.Topic, c.Partition}
			allow := "0"
			if room[k] > 0 {
				allow = "1"
				room[k]--
				allowed[j], progress = true, true
			}
			calls[j] = scriptCall{
				keys: []string{s.keys.click(c.ClickID), s.keys.orphan(c.ClickID)},
				args: []any{allow, ttl, c.Origin, c.TS, c.Deadline, c.Topic, c.Partition, c.Raw},
			}
		}
		cmds, err := runPipelined(ctx, s.rdb, lookupScript, calls)
		if err != nil {
			return nil, redisFailure(op, fmt.Errorf("%d conversions: %w", len(calls), err))
		}
		var refused []int
		for j, cmd := range cmds {
			i := pending[j]
			c := convs[i]
			r, err := lookupReply(cmd)
			if err != nil {
				return nil, permanent(op, fmt.Errorf("click %q: %w", c.ClickID, err))
			}
			if allowed[j] && r.Status != LookupParked {
				room[part{c.Topic, c.Partition}]++ // its share was not used
			}
			results[i] = r
			if r.Status == LookupCapExceeded {
				refused = append(refused, i)
			}
		}
		pending = pending[:0]
		if progress {
			for _, i := range refused {
				if c := convs[i]; room[part{c.Topic, c.Partition}] > 0 {
					pending = append(pending, i)
				}
			}
		}
	}

	pipe = s.rdb.Pipeline()
	due := 0
	for i, r := range results {
		c := convs[i]
		if r.Status == LookupParked || (r.Status == LookupParkedBefore && !r.Claimed) {
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

// lookupReply reads one reply of lookup.lua.
func lookupReply(cmd *redis.Cmd) (LookupResult, error) {
	v, _ := cmd.Val().([]any)
	status := ""
	if len(v) > 0 {
		status, _ = v[0].(string)
	}
	arg := ""
	if len(v) > 1 {
		arg, _ = v[1].(string)
	}
	switch status {
	case "found":
		e, err := decodeClick([]byte(arg))
		if err != nil {
			return LookupResult{}, err
		}
		return LookupResult{Status: LookupFound, Click: e}, nil
	case "parked":
		return LookupResult{Status: LookupParked}, nil
	case "again":
		return LookupResult{Status: LookupParkedBefore, Claimed: arg == "c"}, nil
	case "duplicate":
		return LookupResult{Status: LookupDuplicate, Origin: arg}, nil
	case "cap":
		return LookupResult{Status: LookupCapExceeded}, nil
	}
	return LookupResult{}, fmt.Errorf("%w: lookup status %q", ErrCorrupt, status)
}

// dueBatch is how many due entries DueOrphans settles per round trip.
const dueBatch = 500

// DueOrphans is phase one of the two-phase orphan sweep of topic/partition:
// it marks expiring (with sweeper's name, for diagnosis) and returns every
// parked orphan whose deadline is at or before watermark and that no click
// claimed, together with those marked by an earlier sweep that were not
// settled yet; it deletes the claimed ones. The caller then applies or
// dead-letters the returned orphans (phase two) and calls SettleOrphans
// (phase three); a crash before that makes the next sweep return them
// again, and the conversion markers keep them from counting twice.
func (s *Store) DueOrphans(ctx context.Context, topic string, partition int, watermark int64, sweeper string) ([]Orphan, error) {
	const op = "due orphans"
	if err := validPartition(topic, partition); err != nil {
		return nil, permanent(op, err)
	}
	dkey := s.keys.due(topic, partition)
	upto := strconv.FormatInt(watermark, 10)
	var out []Orphan
	// Every round removes or moves each entry it reads from the score
	// range, except the expiring ones it returns, which it skips over; so
	// rounds end. The bound only guards against a writer racing the sweep;
	// what is left is returned by the next call.
	maxRounds := 2*s.opts.MaxParkedOrphans/dueBatch + 4
	for range maxRounds {
		ids, err := s.rdb.ZRangeArgs(ctx, redis.ZRangeArgs{
			Key: dkey, Start: "-inf", Stop: upto, ByScore: true, Offset: int64(len(out)), Count: dueBatch,
		}).Result()
		if err != nil {
			return out, redisFailure(op, fmt.Errorf("%s/%d: %w", topic, partition, err))
		}
		if len(ids) == 0 {
			return out, nil
		}
		calls := make([]scriptCall, len(ids))
		for i, id := range ids {
			calls[i] = scriptCall{keys: []string{s.keys.orphan(id)}, args: []any{topic, partition, watermark, sweeper}}
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
			default:
				return out, permanent(op, fmt.Errorf("orphan %q: %w: sweep status %q", ids[i], ErrCorrupt, status))
			}
		}
		if len(settled) > 0 {
			pipe.ZRem(ctx, dkey, settled...)
		}
		if pipe.Len() > 0 {
			if _, err := pipe.Exec(ctx); err != nil {
				return out, redisFailure(op, fmt.Errorf("%s/%d: settle: %w", topic, partition, err))
			}
		}
		if len(ids) < dueBatch {
			return out, nil
		}
	}
	return out, nil
}

// SettleOrphans is phase three of the orphan sweep: it deletes the orphans
// of clickIDs that DueOrphans returned for topic/partition and that the
// caller has applied or dead-lettered, and their due entries. The orphan
// goes first, so a crash in between leaves a due entry the next sweep
// drops as gone.
func (s *Store) SettleOrphans(ctx context.Context, topic string, partition int, clickIDs []string) error {
	const op = "settle orphans"
	if err := validPartition(topic, partition); err != nil {
		return permanent(op, err)
	}
	if len(clickIDs) == 0 {
		return nil
	}
	pipe := s.rdb.Pipeline()
	members := make([]any, len(clickIDs))
	for i, id := range clickIDs {
		pipe.Del(ctx, s.keys.orphan(id))
		members[i] = id
	}
	if _, err := pipe.Exec(ctx); err != nil {
		return redisFailure(op, fmt.Errorf("%s/%d: %w", topic, partition, err))
	}
	if err := s.rdb.ZRem(ctx, s.keys.due(topic, partition), members...).Err(); err != nil {
		return redisFailure(op, fmt.Errorf("%s/%d: due set: %w", topic, partition, err))
	}
	return nil
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
