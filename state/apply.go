package state

import (
	"context"
	"errors"
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"
	"time"

	"ripen/estimator"
)

// TopicPartition names a Kafka topic partition.
type TopicPartition struct {
	Topic     string
	Partition int
}

// String returns "<topic>/<partition>".
func (tp TopicPartition) String() string { return partitionField(tp.Topic, tp.Partition) }

// OffsetRange is the inclusive range of offsets of one partition that a delta
// covers.
type OffsetRange struct {
	Topic     string
	Partition int
	// From and To are the first and last offsets covered (inclusive).
	From, To int64
}

// ExperimentDelta is everything one flush adds to one experiment: per-arm
// counts computed by the consumer at Watermark, and the offset ranges they
// cover. Apply applies it with those ranges atomically.
type ExperimentDelta struct {
	// Experiment is the experiment id.
	Experiment string
	// Layout is the experiment's state layout; it must equal the stored one.
	Layout estimator.Layout
	// Watermark is the event time (Unix ms) at which the consumer computed
	// the bucket keys; the stored watermark is raised to it.
	Watermark int64
	// Generation is the consumer-group generation of the writer, for
	// fencing.
	Generation int32
	// Ranges are the offsets this delta covers, at most one per partition.
	Ranges []OffsetRange
	// Arms holds the per-arm changes by arm name.
	Arms map[string]*ArmDelta
}

// ArmDelta is one arm's share of an ExperimentDelta.
type ArmDelta struct {
	// Clicks are new clicks in their canonical buckets at the delta's
	// watermark; Converted must be zero (conversions go in Conversions).
	Clicks []estimator.Bucket
	// MaturedClicks counts new clicks already older than the window.
	MaturedClicks uint64
	// Conversions are newly joined conversions.
	Conversions []ConversionDelta
}

// ConversionDelta is one conversion joined to its click.
type ConversionDelta struct {
	// ClickID identifies the converted click; a click converts once.
	ClickID string
	// Origin is where the conversion was read, "<topic>/<partition>/<offset>",
	// which tells a redelivery (same origin) from a duplicate (another one).
	Origin string
	// Bucket is the click's canonical bucket at the delta's watermark,
	// unless Matured.
	Bucket estimator.BucketKey
	// Matured is true if the click is older than the window.
	Matured bool
	// DelayBin is the delay histogram bin of DelayMs.
	DelayBin int
	// DelayMs is the conversion delay in milliseconds.
	DelayMs int64
	// WithClick adds the conversion's click too (in Bucket, or to the
	// matured clicks), counted only if the conversion is: a self-attributed
	// conversion whose click is not in the click stream brings its own
	// click, and the conversion marker keeps a re-read from counting it
	// twice.
	WithClick bool
}

// ApplyResult says what Apply did.
type ApplyResult struct {
	// Skipped is true if every range had been applied before, so nothing
	// was written (a redelivered batch or a retried call). A retried call
	// reports Skipped even though its first attempt applied the delta; the
	// first attempt's Duplicates are then not reported again.
	Skipped bool
	// Counted is the number of conversions counted.
	Counted int
	// Redelivered is the number of conversions skipped because the same
	// conversion (same origin) had been counted before.
	Redelivered int
	// Duplicates are conversions skipped because another conversion of the
	// same click had been counted.
	Duplicates []Duplicate
	// Compacted lists the arms whose hash this call compacted because its
	// records passed Options.CompactFields or Options.CompactBytes.
	Compacted []string
	// CompactErr is the failure of such a compaction (the delta itself
	// was applied; the arm's next Apply tries again).
	CompactErr error

	sizes []armSize
}

// armSize is an arm hash's field count and record bytes after an apply.
type armSize struct {
	arm           string
	fields, bytes int
}

// Duplicate is a conversion of a click that had already converted.
type Duplicate struct {
	// Arm is the arm of the click.
	Arm string
	// Conversion is the refused conversion.
	Conversion ConversionDelta
	// CountedOrigin is the origin of the conversion that was counted.
	CountedOrigin string
}

// Apply adds d to the stored state of its experiment and records its offset
// ranges, in one atomic script call. It refuses the delta (error matching
// ErrFenced) if a newer generation has written one of its partitions,
// ErrLayoutMismatch if the experiment has another layout, and ErrOverlap if
// a range partly covers applied offsets; it skips it whole (Skipped) if
// every range was applied before. Running it twice applies it once.
//
// A delta without ranges may carry only conversions (self-attributed ones
// with WithClick included): they are applied unconditionally, each counted
// once by its conversion marker. The orphan sweep uses such deltas.
func (s *Store) Apply(ctx context.Context, d *ExperimentDelta) (ApplyResult, error) {
	const op = "apply"
	call, err := s.buildApply(d)
	if err != nil {
		return ApplyResult{}, permanent(op, err)
	}
	if err := s.register(ctx, d.Experiment); err != nil {
		return ApplyResult{}, redisFailure(op, fmt.Errorf("register %q: %w", d.Experiment, err))
	}
	reply, err := applyScript.Run(ctx, s.rdb, call.keys, call.args...).Slice()
	if err != nil {
		return ApplyResult{}, redisFailure(op, fmt.Errorf("experiment %q: %w", d.Experiment, err))
	}
	res, err := parseApplyReply(reply, call.convs, call.arms)
	if err != nil {
		return ApplyResult{}, permanent(op, fmt.Errorf("experiment %q: %w", d.Experiment, err))
	}
	// Compaction on write: an arm whose records grew past the bounds is
	// folded into its base now, so that no arm hash grows with traffic
	// between the refit owner's compactions.
	var errs []error
	for _, sz := range res.sizes {
		if sz.fields <= s.opts.CompactFields && sz.bytes <= s.opts.CompactBytes {
			continue
		}
		if _, err := s.Compact(ctx, d.Experiment, sz.arm); err != nil {
			errs = append(errs, err)
			continue
		}
		res.Compacted = append(res.Compacted, sz.arm)
	}
	res.CompactErr = errors.Join(errs...)
	return res, nil
}

// applyCall is a prepared apply script call and the conversions in the
// order the script sees them.
type applyCall struct {
	keys  []string
	args  []any
	convs []Duplicate
	arms  []string // arm names in script order
}

// buildApply validates d and lays out the script's KEYS and ARGV.
func (s *Store) buildApply(d *ExperimentDelta) (applyCall, error) {
	if d == nil {
		return applyCall{}, fmt.Errorf("%w: nil delta", ErrInvalid)
	}
	exp := d.Experiment
	if err := validExperiment(exp); err != nil {
		return applyCall{}, err
	}
	layout := d.Layout.WithDefaults()
	if err := layout.Validate(); err != nil {
		return applyCall{}, fmt.Errorf("%w: experiment %q: %w", ErrInvalid, exp, err)
	}
	if d.Watermark <= -maxExact || d.Watermark >= maxExact {
		return applyCall{}, fmt.Errorf("%w: experiment %q: watermark %d out of range", ErrInvalid, exp, d.Watermark)
	}
	if len(d.Ranges) == 0 {
		// Without offsets only conversions may be applied: their markers
		// keep a repeated delta from counting twice; clicks have none.
		for name, a := range d.Arms {
			if a != nil && (len(a.Clicks) > 0 || a.MaturedClicks > 0) {
				return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: a delta without offsets carries clicks", ErrInvalid, exp, name)
			}
		}
	}
	maxLevel := levels(layout)
	nbins := len(layout.DelayEdges()) - 1
	window := layout.Window.Milliseconds()

	args := []any{encodeLayout(layout), d.Watermark, d.Generation, (window + s.opts.ClickTTLSlack.Milliseconds()), len(d.Ranges)}
	seen := make(map[TopicPartition]bool, len(d.Ranges))
	for _, r := range d.Ranges {
		if err := validPartition(r.Topic, r.Partition); err != nil {
			return applyCall{}, fmt.Errorf("experiment %q: %w", exp, err)
		}
		tp := TopicPartition{r.Topic, r.Partition}
		if seen[tp] {
			return applyCall{}, fmt.Errorf("%w: experiment %q: two ranges for %s", ErrInvalid, exp, tp)
		}
		seen[tp] = true
		if r.From < 0 || r.From > r.To || r.To >= maxExact {
			return applyCall{}, fmt.Errorf("%w: experiment %q: range %s [%d, %d]", ErrInvalid, exp, tp, r.From, r.To)
		}
		args = append(args, tp.String(), r.From, r.To)
	}

	names := make([]string, 0, len(d.Arms))
	for name, a := range d.Arms {
		if name == "" {
			return applyCall{}, fmt.Errorf("%w: experiment %q: empty arm name", ErrInvalid, exp)
		}
		if a == nil {
			return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: nil arm delta", ErrInvalid, exp, name)
		}
		names = append(names, name)
	}
	slices.Sort(names)
	keys := []string{s.keys.meta(exp), s.keys.arms(exp), s.keys.offsets(exp)}
	for _, name := range names {
		keys = append(keys, s.keys.arm(exp, name))
	}
	args = append(args, len(names))
	var convs []Duplicate
	for _, name := range names {
		a := d.Arms[name]
		clicks := make(map[estimator.BucketKey]uint64, len(a.Clicks))
		for _, b := range a.Clicks {
			if b.Converted != 0 {
				return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: click bucket %d/%d carries %d conversions", ErrInvalid, exp, name, b.Level, b.Index, b.Converted)
			}
			if b.Level > maxLevel {
				return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: bucket level %d above maximum %d", ErrInvalid, exp, name, b.Level, maxLevel)
			}
			n := clicks[b.BucketKey]
			if err := addTo(&n, b.Clicks); err != nil {
				return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: count too large", ErrInvalid, exp, name)
			}
			clicks[b.BucketKey] = n
		}
		if a.MaturedClicks > math.MaxInt64 {
			return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: count %d too large", ErrInvalid, exp, name, a.MaturedClicks)
		}
		args = append(args, name, clickRecord(clicks, a.MaturedClicks), len(a.Conversions))
		for _, c := range a.Conversions {
			if c.ClickID == "" || c.Origin == "" {
				return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: conversion without click id or origin", ErrInvalid, exp, name)
			}
			if c.DelayBin < 0 || c.DelayBin >= nbins {
				return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: delay bin %d outside [0, %d)", ErrInvalid, exp, name, c.DelayBin, nbins)
			}
			if c.DelayMs < 0 || c.DelayMs >= maxExact {
				return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: delay %dms out of range", ErrInvalid, exp, name, c.DelayMs)
			}
			bf, cf := "mv", "mc"
			if !c.Matured {
				if c.Bucket.Level > maxLevel {
					return applyCall{}, fmt.Errorf("%w: experiment %q arm %q: bucket level %d above maximum %d", ErrInvalid, exp, name, c.Bucket.Level, maxLevel)
				}
				bf, cf = bucketField('v', c.Bucket), bucketField('b', c.Bucket)
			}
			if !c.WithClick {
				cf = ""
			}
			keys = append(keys, s.keys.marker(exp, c.ClickID))
			args = append(args, c.Origin, bf, "d:"+strconv.Itoa(c.DelayBin), c.DelayMs, cf)
			convs = append(convs, Duplicate{Arm: name, Conversion: c})
		}
	}
	return applyCall{keys: keys, args: args, convs: convs, arms: names}, nil
}

// parseApplyReply turns the apply script's reply into a result or a refusal.
func parseApplyReply(reply []any, convs []Duplicate, arms []string) (ApplyResult, error) {
	if len(reply) == 0 {
		return ApplyResult{}, fmt.Errorf("%w: empty apply reply", ErrCorrupt)
	}
	status, _ := reply[0].(string)
	str := func(i int) string {
		if i < len(reply) {
			if v, ok := reply[i].(string); ok {
				return v
			}
		}
		return "?"
	}
	switch status {
	case "fenced":
		return ApplyResult{}, fmt.Errorf("%w: partition %s has generation %s", ErrFenced, str(1), str(2))
	case "layout":
		return ApplyResult{}, fmt.Errorf("%w: stored layout %s", ErrLayoutMismatch, str(1))
	case "overlap":
		return ApplyResult{}, fmt.Errorf("%w: partition %s applied up to offset %s", ErrOverlap, str(1), str(2))
	case "skipped":
		return ApplyResult{Skipped: true}, nil
	case "applied":
	default:
		return ApplyResult{}, fmt.Errorf("%w: apply status %q", ErrCorrupt, status)
	}
	if len(reply) < 4 || len(reply)%2 != 0 {
		return ApplyResult{}, fmt.Errorf("%w: apply reply of %d elements", ErrCorrupt, len(reply))
	}
	counted, ok1 := reply[1].(int64)
	redelivered, ok2 := reply[2].(int64)
	sizes, ok3 := reply[3].([]any)
	if !ok1 || !ok2 || !ok3 || len(sizes) != 2*len(arms) {
		return ApplyResult{}, fmt.Errorf("%w: apply counts %v %v %v", ErrCorrupt, reply[1], reply[2], reply[3])
	}
	res := ApplyResult{Counted: int(counted), Redelivered: int(redelivered)}
	for i, name := range arms {
		fields, ok1 := sizes[2*i].(int64)
		bytes, ok2 := sizes[2*i+1].(int64)
		if !ok1 || !ok2 {
			return ApplyResult{}, fmt.Errorf("%w: apply sizes %v", ErrCorrupt, sizes)
		}
		res.sizes = append(res.sizes, armSize{arm: name, fields: int(fields), bytes: int(bytes)})
	}
	for i := 4; i+1 < len(reply); i += 2 {
		idx, ok := reply[i].(int64)
		if !ok || idx < 1 || int(idx) > len(convs) {
			return ApplyResult{}, fmt.Errorf("%w: duplicate index %v", ErrCorrupt, reply[i])
		}
		dup := convs[idx-1]
		dup.CountedOrigin = str(i + 1)
		res.Duplicates = append(res.Duplicates, dup)
	}
	return res, nil
}

// bucketField names a bucket's field in an arm hash: kind 'b' for clicks,
// 'v' for converted.
func bucketField(kind byte, k estimator.BucketKey) string {
	b := make([]byte, 0, 24)
	b = append(b, kind, ':')
	b = strconv.AppendUint(b, uint64(k.Level), 10)
	b = append(b, ':')
	b = strconv.AppendInt(b, k.Index, 10)
	return string(b)
}

// levels returns the coarsest bucket level of layout l: no bucket is wider
// than the window (the rule of estimator.Layout).
func levels(l estimator.Layout) uint8 {
	base, w := l.Base.Milliseconds(), l.Window.Milliseconds()
	var k uint8
	for k < 40 && base<<(k+1) <= w {
		k++
	}
	return k
}

// encodeLayout writes a layout (defaults applied) as
// "<window ms>:<base ms>:<age error>:<bins per decade>"; equal layouts give
// equal strings.
func encodeLayout(l estimator.Layout) string {
	return strconv.FormatInt(l.Window.Milliseconds(), 10) + ":" +
		strconv.FormatInt(l.Base.Milliseconds(), 10) + ":" +
		strconv.FormatFloat(l.AgeError, 'g', -1, 64) + ":" +
		strconv.Itoa(l.BinsPerDecade)
}

// decodeLayout parses encodeLayout's output.
func decodeLayout(s string) (estimator.Layout, error) {
	parts := strings.Split(s, ":")
	if len(parts) != 4 {
		return estimator.Layout{}, fmt.Errorf("%w: layout %q", ErrCorrupt, s)
	}
	w, err1 := strconv.ParseInt(parts[0], 10, 64)
	b, err2 := strconv.ParseInt(parts[1], 10, 64)
	ae, err3 := strconv.ParseFloat(parts[2], 64)
	bins, err4 := strconv.Atoi(parts[3])
	if err1 != nil || err2 != nil || err3 != nil || err4 != nil {
		return estimator.Layout{}, fmt.Errorf("%w: layout %q", ErrCorrupt, s)
	}
	l := estimator.Layout{
		Window:        time.Duration(w) * time.Millisecond,
		Base:          time.Duration(b) * time.Millisecond,
		AgeError:      ae,
		BinsPerDecade: bins,
	}
	if err := l.Validate(); err != nil {
		return estimator.Layout{}, fmt.Errorf("%w: layout %q: %w", ErrCorrupt, s, err)
	}
	return l, nil
}
