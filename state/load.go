package state

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"

	"github.com/redis/go-redis/v9"

	"ripen/estimator"
)

// Experiment is the stored state of one experiment at one instant.
type Experiment struct {
	// ID is the experiment id.
	ID string
	// Layout is the layout every arm state has.
	Layout estimator.Layout
	// Watermark is the highest delta watermark applied (Unix ms).
	Watermark int64
	// Arms are the arm names, sorted.
	Arms []string
	// States holds each arm's state, canonical at Watermark.
	States map[string]*estimator.ArmState
	// Offsets are the offsets applied per partition.
	Offsets map[TopicPartition]AppliedOffset
	// Held counts, per arm, conversions stored but left out of States
	// because their click's delta has not landed yet (nil if none).
	Held map[string]uint64

	// folds holds, per arm whose hash holds records, the hash as read
	// and the base that replaces it (see CompactLoaded).
	folds map[string]fold
}

// fold is an arm hash as Load read it and the base it folds into.
type fold struct {
	read, base map[string]string
}

// AppliedOffset is the last offset of a partition applied to an experiment
// and the consumer generation that applied it.
type AppliedOffset struct {
	// Generation is the consumer-group generation of the last writer.
	Generation int32
	// Offset is the last offset applied (inclusive).
	Offset int64
}

// loadAttempts bounds Load's retries when arms are added while it reads.
const loadAttempts = 16

// runLoad reads the experiment's arm names and runs the load script over
// its meta, arm set, offsets and arm hashes in one atomic call. The reply
// starts with a status: "ok", "missing" (no meta hash) or "retry" (the
// arm set changed since it was read).
func (s *Store) runLoad(ctx context.Context, op, experiment string) (names []string, reply []any, err error) {
	names, err = s.rdb.SMembers(ctx, s.keys.arms(experiment)).Result()
	if err != nil {
		return nil, nil, redisFailure(op, fmt.Errorf("experiment %q: arms: %w", experiment, err))
	}
	slices.Sort(names)
	keys := []string{s.keys.meta(experiment), s.keys.arms(experiment), s.keys.offsets(experiment)}
	args := make([]any, len(names))
	for i, n := range names {
		keys = append(keys, s.keys.arm(experiment, n))
		args[i] = n
	}
	reply, err = loadScript.Run(ctx, s.rdb, keys, args...).Slice()
	if err != nil {
		return nil, nil, redisFailure(op, fmt.Errorf("experiment %q: %w", experiment, err))
	}
	if len(reply) == 0 {
		return nil, nil, permanent(op, fmt.Errorf("experiment %q: %w: empty load reply", experiment, ErrCorrupt))
	}
	return names, reply, nil
}

// Load reads an experiment's state in one atomic script call and rebuilds
// each arm's estimator state, canonical at the stored watermark. It returns
// an error matching ErrNotFound if nothing was applied to the experiment.
func (s *Store) Load(ctx context.Context, experiment string) (*Experiment, error) {
	const op = "load"
	if err := validExperiment(experiment); err != nil {
		return nil, permanent(op, err)
	}
	for range loadAttempts {
		names, reply, err := s.runLoad(ctx, op, experiment)
		if err != nil {
			return nil, err
		}
		status, _ := reply[0].(string)
		switch status {
		case "retry":
			continue
		case "missing":
			return nil, permanent(op, fmt.Errorf("experiment %q: %w", experiment, ErrNotFound))
		case "ok":
		default:
			return nil, permanent(op, fmt.Errorf("experiment %q: %w: load status %q", experiment, ErrCorrupt, status))
		}
		if len(reply) != 3+len(names) {
			return nil, permanent(op, fmt.Errorf("experiment %q: %w: load reply of %d elements", experiment, ErrCorrupt, len(reply)))
		}
		e, err := buildExperiment(experiment, names, reply[1:])
		if err != nil {
			return nil, permanent(op, fmt.Errorf("experiment %q: %w", experiment, err))
		}
		return e, nil
	}
	return nil, &Error{Op: op, Retriable: true, Err: fmt.Errorf("experiment %q: %w: arms kept changing", experiment, ErrConflict)}
}

// buildExperiment parses the load script's meta, offsets and arm hashes.
func buildExperiment(id string, names []string, parts []any) (*Experiment, error) {
	meta, err := flatHash(parts[0])
	if err != nil {
		return nil, fmt.Errorf("meta: %w", err)
	}
	layout, wm, err := parseMeta(meta)
	if err != nil {
		return nil, err
	}
	offs, err := flatHash(parts[1])
	if err != nil {
		return nil, fmt.Errorf("offsets: %w", err)
	}
	e := &Experiment{ID: id, Layout: layout, Watermark: wm, Arms: names, States: make(map[string]*estimator.ArmState, len(names))}
	if e.Offsets, err = parseOffsets(offs); err != nil {
		return nil, err
	}
	for i, name := range names {
		h, err := flatHash(parts[2+i])
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", name, err)
		}
		c, err := canonicalize(layout, wm, h)
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", name, err)
		}
		if _, base := h[armBaseField]; len(h) > 1 || (len(h) == 1 && !base) {
			if e.folds == nil {
				e.folds = make(map[string]fold)
			}
			e.folds[name] = fold{read: h, base: c.fields()}
		}
		st, held, err := c.state(layout, wm)
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", name, err)
		}
		e.States[name] = st
		if held > 0 {
			if e.Held == nil {
				e.Held = make(map[string]uint64)
			}
			e.Held[name] = held
		}
	}
	return e, nil
}

// canonicalArm parses the load script's reply for arm name (a flat hash)
// and canonicalizes its counts at wm.
func canonicalArm(layout estimator.Layout, wm int64, name string, part any) (armCounts, error) {
	h, err := flatHash(part)
	if err != nil {
		return armCounts{}, fmt.Errorf("arm %q: %w", name, err)
	}
	c, err := canonicalize(layout, wm, h)
	if err != nil {
		return armCounts{}, fmt.Errorf("arm %q: %w", name, err)
	}
	return c, nil
}

// parseMeta reads the layout and watermark of a meta hash.
func parseMeta(meta map[string]string) (estimator.Layout, int64, error) {
	ls, ok := meta["layout"]
	if !ok {
		return estimator.Layout{}, 0, fmt.Errorf("%w: no layout", ErrCorrupt)
	}
	layout, err := decodeLayout(ls)
	if err != nil {
		return estimator.Layout{}, 0, err
	}
	ws, ok := meta["wm"]
	if !ok {
		return estimator.Layout{}, 0, fmt.Errorf("%w: no watermark", ErrCorrupt)
	}
	wm, err := parseInt(ws)
	if err != nil {
		return estimator.Layout{}, 0, fmt.Errorf("watermark: %w", err)
	}
	return layout, wm, nil
}

// Offsets returns the offsets applied to an experiment per partition
// (empty if none), for the consumer to filter redelivered events.
func (s *Store) Offsets(ctx context.Context, experiment string) (map[TopicPartition]AppliedOffset, error) {
	const op = "offsets"
	if err := validExperiment(experiment); err != nil {
		return nil, permanent(op, err)
	}
	h, err := s.rdb.HGetAll(ctx, s.keys.offsets(experiment)).Result()
	if err != nil {
		return nil, redisFailure(op, fmt.Errorf("experiment %q: %w", experiment, err))
	}
	offs, err := parseOffsets(h)
	if err != nil {
		return nil, permanent(op, fmt.Errorf("experiment %q: %w", experiment, err))
	}
	return offs, nil
}

// parseOffsets reads an offsets hash: "<topic>/<partition>" ->
// "<generation>:<offset>".
func parseOffsets(h map[string]string) (map[TopicPartition]AppliedOffset, error) {
	out := make(map[TopicPartition]AppliedOffset, len(h))
	for f, v := range h {
		tp, err := parsePartitionField(f)
		if err != nil {
			return nil, err
		}
		g, o, ok := strings.Cut(v, ":")
		gen, err1 := strconv.ParseInt(g, 10, 32)
		off, err2 := strconv.ParseInt(o, 10, 64)
		if !ok || err1 != nil || err2 != nil {
			return nil, fmt.Errorf("%w: offset %q of %s", ErrCorrupt, v, f)
		}
		out[tp] = AppliedOffset{Generation: int32(gen), Offset: off}
	}
	return out, nil
}

// flatHash converts a flat field/value array (HGETALL's reply inside a
// script reply) to a map.
func flatHash(v any) (map[string]string, error) {
	arr, ok := v.([]any)
	if !ok || len(arr)%2 != 0 {
		return nil, fmt.Errorf("%w: hash reply %T", ErrCorrupt, v)
	}
	h := make(map[string]string, len(arr)/2)
	for i := 0; i < len(arr); i += 2 {
		f, ok1 := arr[i].(string)
		val, ok2 := arr[i+1].(string)
		if !ok1 || !ok2 {
			return nil, fmt.Errorf("%w: hash entry %v=%v", ErrCorrupt, arr[i], arr[i+1])
		}
		h[f] = val
	}
	return h, nil
}

// canonicalize re-keys an arm hash to canonical buckets at wm.
//
// Click and conversion counts of one click time may sit in buckets of
// different levels (a conversion is keyed at its own delta's watermark),
// so each kind is re-keyed on its own: every bucket goes to the canonical
// bucket at wm of its start time (estimator.Placement), which holds it
// whole, as Advance re-keys a state, since no bucket was keyed at a later
// watermark than the stored one; one that has matured goes to the matured
// totals.
func canonicalize(l estimator.Layout, wm int64, h map[string]string) (armCounts, error) {
	place := l.Placement()
	nbins := len(l.DelayEdges()) - 1
	a, err := parseArmHash(h, nbins)
	if err != nil {
		return armCounts{}, err
	}
	top := levels(l)
	base := l.Base.Milliseconds()
	rekey := func(m map[estimator.BucketKey]uint64) (map[estimator.BucketKey]uint64, uint64, error) {
		res := make(map[estimator.BucketKey]uint64, len(m))
		var matured uint64
		for k, n := range m {
			if n == 0 {
				continue
			}
			width := base << k.Level
			if k.Level > top || k.Index > maxExact/width || k.Index < -maxExact/width {
				return nil, 0, fmt.Errorf("bucket %d/%d out of range", k.Level, k.Index)
			}
			nk, done := place.PendingBucket(k.Index*width, wm)
			if done {
				if err := addTo(&matured, n); err != nil {
					return nil, 0, err
				}
				continue
			}
			v := res[nk]
			if err := addTo(&v, n); err != nil {
				return nil, 0, err
			}
			res[nk] = v
		}
		return res, matured, nil
	}
	c := armCounts{delays: a.delays, delayCount: a.delayCount, delaySumMs: a.delaySumMs}
	var mc, mv uint64
	if c.clicks, mc, err = rekey(a.clicks); err != nil {
		return armCounts{}, fmt.Errorf("%w: clicks: %w", ErrCorrupt, err)
	}
	if c.converted, mv, err = rekey(a.converted); err != nil {
		return armCounts{}, fmt.Errorf("%w: conversions: %w", ErrCorrupt, err)
	}
	c.maturedClicks, c.maturedConversions = a.maturedClicks, a.maturedConversions
	if err := errors.Join(addTo(&c.maturedClicks, mc), addTo(&c.maturedConversions, mv)); err != nil {
		return armCounts{}, err
	}
	return c, nil
}

// state builds the estimator state at wm. Conversions beyond their
// bucket's clicks are held back and counted in held: the delta of a
// conversion can land before the delta of its click when the two are
// consumed from different partitions, and they show once the click lands.
func (c armCounts) state(l estimator.Layout, wm int64) (st *estimator.ArmState, held uint64, err error) {
	snap := estimator.ArmSnapshot{
		Layout:             l,
		Watermark:          wm,
		MaturedClicks:      c.maturedClicks,
		MaturedConversions: min(c.maturedConversions, c.maturedClicks),
		Delays:             c.delays,
		DelayCount:         c.delayCount,
		DelaySumMs:         c.delaySumMs,
	}
	held = c.maturedConversions - snap.MaturedConversions
	for k, n := range c.clicks {
		v := min(c.converted[k], n)
		held += c.converted[k] - v
		snap.Buckets = append(snap.Buckets, estimator.Bucket{BucketKey: k, BucketCounts: estimator.BucketCounts{Clicks: n, Converted: v}})
	}
	for k, n := range c.converted {
		if _, ok := c.clicks[k]; !ok {
			held += n
		}
	}
	st, err = estimator.FromSnapshot(snap)
	if err != nil {
		return nil, 0, fmt.Errorf("%w: %w", ErrCorrupt, err)
	}
	return st, held, nil
}

// CompactLoaded folds, as Compact does, the hash of every arm of ex (as
// Load returned it) that holds records into its base, in one round trip:
// each rewrite is a compare-and-set against the hash Load read, so an arm
// written since is left for later. It returns the arms rewritten. The
// refit owner calls it after each refit with the state it loaded.
func (s *Store) CompactLoaded(ctx context.Context, ex *Experiment) ([]string, error) {
	if ex == nil || len(ex.folds) == 0 {
		return nil, nil
	}
	names := make([]string, 0, len(ex.folds))
	for name := range ex.folds {
		names = append(names, name)
	}
	slices.Sort(names)
	calls := make([]scriptCall, len(names))
	for i, name := range names {
		calls[i] = scriptCall{keys: []string{s.keys.arm(ex.ID, name)}, args: compactArgs(ex.folds[name].read, ex.folds[name].base)}
	}
	cmds, err := runPipelined(ctx, s.rdb, compactScript, calls)
	if err != nil {
		return nil, redisFailure("compact", fmt.Errorf("experiment %q: %w", ex.ID, err))
	}
	var done []string
	for i, cmd := range cmds {
		if n, _ := cmd.Int(); n == 1 {
			done = append(done, names[i])
		}
	}
	return done, nil
}

// compactArgs lays out compact.lua's ARGV: the fields read, then the ones
// that replace them.
func compactArgs(read, want map[string]string) []any {
	args := make([]any, 0, 1+2*len(read)+2*len(want))
	args = append(args, len(read))
	for _, f := range sortedKeys(read) {
		args = append(args, f, read[f])
	}
	for _, f := range sortedKeys(want) {
		args = append(args, f, want[f])
	}
	return args
}

// CompactResult says what Compact did.
type CompactResult struct {
	// FieldsBefore and FieldsAfter count the arm hash's fields.
	FieldsBefore, FieldsAfter int
	// Attempts is the number of compare-and-set attempts made.
	Attempts int
}

// Compact folds one arm's hash into its base (see state/armformat.go),
// canonical at the stored watermark: the base alone, holding every count
// and no zero one. It reads the hash, computes the base and replaces the
// hash only if it still holds what was read (compare-and-set), retrying up
// to Options.CompactAttempts times, so it is safe beside concurrent Apply
// calls. A hash that holds its base alone is left as it is: its buckets
// may be finer than canonical at a later watermark, which Load re-keys,
// and it is no larger than a canonical state at the watermark it was
// written at. Load returns the same state before and after.
func (s *Store) Compact(ctx context.Context, experiment, arm string) (CompactResult, error) {
	const op = "compact"
	if err := validExperiment(experiment); err != nil {
		return CompactResult{}, permanent(op, err)
	}
	akey, mkey := s.keys.arm(experiment, arm), s.keys.meta(experiment)
	var res CompactResult
	for res.Attempts < s.opts.CompactAttempts {
		res.Attempts++
		var hcmd *redis.MapStringStringCmd
		var mcmd *redis.SliceCmd
		_, err := s.rdb.TxPipelined(ctx, func(p redis.Pipeliner) error {
			hcmd = p.HGetAll(ctx, akey)
			mcmd = p.HMGet(ctx, mkey, "layout", "wm")
			return nil
		})
		if err != nil {
			return res, redisFailure(op, fmt.Errorf("experiment %q arm %q: read: %w", experiment, arm, err))
		}
		h := hcmd.Val()
		res.FieldsBefore, res.FieldsAfter = len(h), len(h)
		if _, base := h[armBaseField]; len(h) == 0 || (len(h) == 1 && base) {
			return res, nil
		}
		meta := map[string]string{}
		for i, f := range []string{"layout", "wm"} {
			if v, ok := mcmd.Val()[i].(string); ok {
				meta[f] = v
			}
		}
		layout, wm, err := parseMeta(meta)
		if err != nil {
			return res, permanent(op, fmt.Errorf("experiment %q: %w", experiment, err))
		}
		c, err := canonicalize(layout, wm, h)
		if err != nil {
			return res, permanent(op, fmt.Errorf("experiment %q arm %q: %w", experiment, arm, err))
		}
		want := c.fields()
		res.FieldsAfter = len(want)
		if maps2Equal(h, want) {
			return res, nil
		}
		ok, err := compactScript.Run(ctx, s.rdb, []string{akey}, compactArgs(h, want)...).Int()
		if err != nil {
			return res, redisFailure(op, fmt.Errorf("experiment %q arm %q: %w", experiment, arm, err))
		}
		if ok == 1 {
			return res, nil
		}
	}
	return res, &Error{Op: op, Retriable: true, Err: fmt.Errorf("experiment %q arm %q: %w after %d attempts", experiment, arm, ErrConflict, res.Attempts)}
}

func maps2Equal(a, b map[string]string) bool {
	if len(a) != len(b) {
		return false
	}
	for k, v := range a {
		if w, ok := b[k]; !ok || w != v {
			return false
		}
	}
	return true
}

func sortedKeys(m map[string]string) []string {
	ks := make([]string, 0, len(m))
	for k := range m {
		ks = append(ks, k)
	}
	slices.Sort(ks)
	return ks
}
