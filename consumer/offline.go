package consumer

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"slices"
	"strings"

	"ripen/estimator"
)

// Source names used in Rejection.Source and in strict-mode errors.
const (
	SourceClicks      = "clicks"
	SourceConversions = "conversions"
)

// DefaultMaxLineBytes is the default longest JSON Lines line, 1 MiB.
const DefaultMaxLineBytes = 1 << 20

// ctxCheckEvery is how many lines BuildOffline reads between context checks.
const ctxCheckEvery = 4096

// OfflineOptions configures BuildOffline.
type OfflineOptions struct {
	// AsOf is the as-of time in Unix ms: every arm state is advanced to it,
	// and events after it have not happened yet and are ignored. Required:
	// it must lie in [MinEventTime, MaxEventTime).
	AsOf int64
	// Layout is the shape of every arm state; its Window is also the
	// attribution window of the join. Default: estimator defaults for zero
	// fields (7-day window).
	Layout estimator.Layout
	// Strict makes the first rejection fatal: BuildOffline returns an error
	// naming the source, line and reason. Default: false (rejections are
	// collected and the build goes on).
	Strict bool
	// MaxLineBytes is the longest line accepted, excluding the line
	// terminator; longer lines are rejected with ReasonLineTooLong.
	// Default: DefaultMaxLineBytes (1 MiB).
	MaxLineBytes int
}

// WithDefaults returns o with zero fields set to their defaults.
func (o OfflineOptions) WithDefaults() OfflineOptions {
	o.Layout = o.Layout.WithDefaults()
	if o.MaxLineBytes == 0 {
		o.MaxLineBytes = DefaultMaxLineBytes
	}
	return o
}

// Validate reports what is wrong with o, after defaults are applied.
func (o OfflineOptions) Validate() error {
	o = o.WithDefaults()
	var errs []error
	if o.AsOf < MinEventTime || o.AsOf >= MaxEventTime {
		errs = append(errs, fmt.Errorf("offline options: as-of time %d ms must be in [%d, %d)", o.AsOf, MinEventTime, MaxEventTime))
	}
	if err := o.Layout.Validate(); err != nil {
		errs = append(errs, fmt.Errorf("offline options: %w", err))
	}
	if o.MaxLineBytes < 0 {
		errs = append(errs, fmt.Errorf("offline options: max line bytes %d must not be negative", o.MaxLineBytes))
	}
	return errors.Join(errs...)
}

// Rejection is one rejected input line.
type Rejection struct {
	Source string // SourceClicks or SourceConversions
	Line   int    // 1-based line number in its source
	Reason Reason
	Detail string
}

// OfflineResult is the outcome of BuildOffline.
type OfflineResult struct {
	// AsOf is the as-of time every arm state was advanced to.
	AsOf int64
	// Experiments lists every experiment with at least one counted click,
	// sorted by name; each lists its arms sorted by name.
	Experiments []ExperimentStates
	// Rejections lists every rejected line: click lines first, then
	// conversion lines, each in input order.
	Rejections []Rejection
	// Clicks and Conversions count the events recorded in the arm states
	// (self-attributed conversions included in Conversions).
	Clicks, Conversions int
	// SelfAttributed counts conversions whose click was not in the click
	// stream but which carried their own experiment, arm and click_ts; each
	// also added its click to the arm (see BuildOffline).
	SelfAttributed int
	// FutureClicks and FutureConversions count well-formed events after
	// AsOf, which were ignored (and are not rejections).
	FutureClicks, FutureConversions int
}

// ExperimentStates holds the arm states of one experiment.
type ExperimentStates struct {
	Name string
	Arms []ArmStates
}

// ArmStates holds the state of one arm.
type ArmStates struct {
	Name  string
	State *estimator.ArmState
}

// Arm returns the state of the named arm, or nil if it has none.
func (r *OfflineResult) Arm(experiment, arm string) *estimator.ArmState {
	i, ok := slices.BinarySearchFunc(r.Experiments, experiment, func(e ExperimentStates, n string) int { return strings.Compare(e.Name, n) })
	if !ok {
		return nil
	}
	arms := r.Experiments[i].Arms
	j, ok := slices.BinarySearchFunc(arms, arm, func(a ArmStates, n string) int { return strings.Compare(a.Name, n) })
	if !ok {
		return nil
	}
	return arms[j].State
}

// armKey names one arm of one experiment.
type armKey struct{ experiment, arm string }

// indexedClick is what the click index keeps per click_id.
type indexedClick struct {
	arm       *armEntry
	ts        int64
	converted bool
}

type armEntry struct {
	key   armKey
	state *estimator.ArmState // nil until the arm has a counted click
}

// offlineJoin is the in-memory state of one BuildOffline call.
type offlineJoin struct {
	opts     OfflineOptions
	windowMs int64
	arms     map[armKey]*armEntry
	clicks   map[string]*indexedClick
	res      *OfflineResult
}

// BuildOffline reads a click stream and a conversion stream, both JSON
// Lines (one event object per line; blank lines skipped), joins each
// conversion to its click by click_id, and returns one arm state per
// experiment arm, advanced to opts.AsOf. The click stream is read to the end
// before the conversion stream is read; the click index is held in memory.
//
// Join rules:
//   - A click whose click_id was already seen is rejected (duplicate_click);
//     the first one is kept.
//   - A click or conversion with ts after AsOf has not happened yet: it is
//     counted in FutureClicks or FutureConversions and otherwise ignored. A
//     future click still enters the index, so that an earlier conversion of
//     it is rejected as conversion_before_click, not unknown_click.
//   - A conversion is recorded when its click is known, its delay
//     (ts - click ts) lies in [0, window] and its click has not converted
//     yet; otherwise it is rejected (conversion_before_click,
//     conversion_after_window, duplicate_conversion).
//   - A conversion that carries experiment, arm or click_ts disagreeing with
//     the known click is rejected (attribution_mismatch): such a conflict
//     means the click_id is reused or one producer is wrong, and counting it
//     against either arm would be a guess. Fields it does not carry are not
//     compared; click_ts must equal the click's ts to the millisecond.
//   - A conversion whose click is unknown is rejected (unknown_click) unless
//     it carries experiment, arm and click_ts (Conversion.Attributed). Then
//     it is self-attributed: checked against the window like any other, and
//     recorded together with its click (one click at click_ts), because an
//     arm state must never hold more conversions than clicks. This helps when
//     the click stream starts later than the conversions' clicks; it biases
//     the rate upward if the click stream is incomplete, so SelfAttributed
//     reports how many there were.
//
// Malformed lines are rejected with the decoder's reason; lines longer than
// opts.MaxLineBytes with line_too_long. Without opts.Strict rejections are
// collected in the result; with it the first one ends the build with an
// error wrapping its *RejectError. Read errors and context cancellation end
// the build with an error.
func BuildOffline(ctx context.Context, clicks, conversions io.Reader, opts OfflineOptions) (*OfflineResult, error) {
	if err := opts.Validate(); err != nil {
		return nil, fmt.Errorf("build offline: %w", err)
	}
	opts = opts.WithDefaults()
	j := &offlineJoin{
		opts:     opts,
		windowMs: opts.Layout.Window.Milliseconds(),
		arms:     make(map[armKey]*armEntry),
		clicks:   make(map[string]*indexedClick),
		res:      &OfflineResult{AsOf: opts.AsOf},
	}
	if err := j.readLines(ctx, clicks, SourceClicks, j.click); err != nil {
		return nil, err
	}
	if err := j.readLines(ctx, conversions, SourceConversions, j.conversion); err != nil {
		return nil, err
	}
	j.collect()
	return j.res, nil
}

// readLines feeds every non-blank line of r to handle, recording
// rejections (or failing on the first one in strict mode).
func (j *offlineJoin) readLines(ctx context.Context, r io.Reader, source string, handle func([]byte) error) error {
	lr := newLineReader(r, j.opts.MaxLineBytes)
	for {
		if lr.line%ctxCheckEvery == 0 {
			if err := ctx.Err(); err != nil {
				return fmt.Errorf("build offline: %s line %d: %w", source, lr.line, err)
			}
		}
		line, tooLong, err := lr.next()
		if err == io.EOF {
			return nil
		}
		if err != nil {
			return fmt.Errorf("build offline: reading %s line %d: %w", source, lr.line, err)
		}
		if lr.line == 1 {
			line = bytes.TrimPrefix(line, []byte("\xef\xbb\xbf")) // UTF-8 byte order mark
		}
		var herr error
		switch {
		case tooLong:
			herr = reject(ReasonLineTooLong, "line exceeds %d bytes", j.opts.MaxLineBytes)
		case len(bytes.TrimSpace(line)) == 0:
			continue
		default:
			herr = handle(line)
		}
		if herr == nil {
			continue
		}
		var rej *RejectError
		if !errors.As(herr, &rej) {
			return fmt.Errorf("build offline: %s line %d: %w", source, lr.line, herr)
		}
		if j.opts.Strict {
			return fmt.Errorf("build offline: %s line %d: %w", source, lr.line, rej)
		}
		j.res.Rejections = append(j.res.Rejections, Rejection{Source: source, Line: lr.line, Reason: rej.Reason, Detail: rej.Detail})
	}
}

// arm returns the entry of an arm, creating it if needed.
func (j *offlineJoin) arm(experiment, arm string) *armEntry {
	k := armKey{experiment, arm}
	a := j.arms[k]
	if a == nil {
		a = &armEntry{key: k}
		j.arms[k] = a
	}
	return a
}

// state returns the arm's state, creating it at the as-of watermark, so that
// clicks land directly in the buckets they have at AsOf.
func (j *offlineJoin) state(a *armEntry) *estimator.ArmState {
	if a.state == nil {
		a.state = estimator.NewArmState(j.opts.Layout)
		a.state.Advance(j.opts.AsOf)
	}
	return a.state
}

func (j *offlineJoin) click(line []byte) error {
	c, err := DecodeClick(line)
	if err != nil {
		return err
	}
	if _, dup := j.clicks[c.ClickID]; dup {
		return reject(ReasonDuplicateClick, "click_id %q already seen", c.ClickID)
	}
	a := j.arm(c.Experiment, c.Arm)
	j.clicks[c.ClickID] = &indexedClick{arm: a, ts: c.TS}
	if c.TS > j.opts.AsOf {
		j.res.FutureClicks++
		return nil
	}
	j.state(a).AddClicks(c.TS, 1)
	j.res.Clicks++
	return nil
}

func (j *offlineJoin) conversion(line []byte) error {
	v, err := DecodeConversion(line)
	if err != nil {
		return err
	}
	if v.TS > j.opts.AsOf {
		j.res.FutureConversions++
		return nil
	}
	ic := j.clicks[v.ClickID]
	if ic == nil {
		if !v.Attributed {
			return reject(ReasonUnknownClick, "no click with click_id %q", v.ClickID)
		}
		if err := j.checkDelay(v.ClickTS, v.TS); err != nil {
			return err
		}
		a := j.arm(v.Experiment, v.Arm)
		// Index the click so that a second conversion is a duplicate.
		j.clicks[v.ClickID] = &indexedClick{arm: a, ts: v.ClickTS, converted: true}
		s := j.state(a)
		s.AddClicks(v.ClickTS, 1)
		s.AddConversion(v.ClickTS, v.TS)
		j.res.Clicks++
		j.res.Conversions++
		j.res.SelfAttributed++
		return nil
	}
	switch {
	case v.Experiment != "" && v.Experiment != ic.arm.key.experiment:
		return reject(ReasonAttributionMismatch, "conversion says experiment %q, click %q has %q", v.Experiment, v.ClickID, ic.arm.key.experiment)
	case v.Arm != "" && v.Arm != ic.arm.key.arm:
		return reject(ReasonAttributionMismatch, "conversion says arm %q, click %q has %q", v.Arm, v.ClickID, ic.arm.key.arm)
	case v.ClickTS != 0 && v.ClickTS != ic.ts:
		return reject(ReasonAttributionMismatch, "conversion says click_ts %d, click %q has %d", v.ClickTS, v.ClickID, ic.ts)
	case ic.converted:
		return reject(ReasonDuplicateConversion, "click %q already converted", v.ClickID)
	}
	if err := j.checkDelay(ic.ts, v.TS); err != nil {
		return err
	}
	ic.converted = true
	j.state(ic.arm).AddConversion(ic.ts, v.TS)
	j.res.Conversions++
	return nil
}

// checkDelay checks that a conversion at convTS of a click at clickTS lies
// in the attribution window [0, W].
func (j *offlineJoin) checkDelay(clickTS, convTS int64) error {
	d := convTS - clickTS
	switch {
	case d < 0:
		return reject(ReasonConversionBeforeClick, "conversion %d ms before its click", -d)
	case d > j.windowMs:
		return reject(ReasonConversionAfterWindow, "delay %d ms exceeds window %d ms", d, j.windowMs)
	}
	return nil
}

// collect fills res.Experiments with the arms that have a state, sorted.
func (j *offlineJoin) collect() {
	keys := make([]armKey, 0, len(j.arms))
	for k, a := range j.arms {
		if a.state != nil {
			keys = append(keys, k)
		}
	}
	slices.SortFunc(keys, func(a, b armKey) int {
		if c := strings.Compare(a.experiment, b.experiment); c != 0 {
			return c
		}
		return strings.Compare(a.arm, b.arm)
	})
	for _, k := range keys {
		n := len(j.res.Experiments)
		if n == 0 || j.res.Experiments[n-1].Name != k.experiment {
			j.res.Experiments = append(j.res.Experiments, ExperimentStates{Name: k.experiment})
			n++
		}
		e := &j.res.Experiments[n-1]
		e.Arms = append(e.Arms, ArmStates{Name: k.arm, State: j.arms[k].state})
	}
}

// lineReader splits a stream into lines of at most max bytes (terminator
// excluded), counting lines from 1 and consuming over-long lines whole.
type lineReader struct {
	r    *bufio.Reader
	max  int
	buf  []byte
	line int
}

func newLineReader(r io.Reader, max int) *lineReader {
	return &lineReader{r: bufio.NewReaderSize(r, 64<<10), max: max}
}

// next returns the next line without its "\n" or "\r\n" terminator and
// whether it was longer than the limit (then the line is nil). It returns
// io.EOF once the stream is exhausted; a final line without a terminator
// is still returned.
func (lr *lineReader) next() (line []byte, tooLong bool, err error) {
	lr.buf = lr.buf[:0]
	read := 0
	for {
		frag, err := lr.r.ReadSlice('\n')
		read += len(frag)
		if !tooLong {
			// Keep one extra byte for a '\r' before the '\n'.
			if len(lr.buf)+len(frag) > lr.max+2 {
				tooLong = true
				lr.buf = lr.buf[:0]
			} else {
				lr.buf = append(lr.buf, frag...)
			}
		}
		switch {
		case err == bufio.ErrBufferFull:
			continue
		case err == io.EOF && read == 0:
			return nil, false, io.EOF
		case err != nil && err != io.EOF:
			return nil, false, err
		}
		lr.line++
		if tooLong {
			return nil, true, nil
		}
		line := bytes.TrimSuffix(lr.buf, []byte("\n"))
		line = bytes.TrimSuffix(line, []byte("\r"))
		if len(line) > lr.max {
			return nil, true, nil
		}
		return line, false, nil
	}
}
