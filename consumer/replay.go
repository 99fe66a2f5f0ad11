package consumer

import (
	"context"
	"errors"
	"fmt"
	"io"
	"slices"
	"strconv"
	"sync"
	"time"

	"github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"ripen/state"
)

// discardWriter drops every message: the allocation or dead-letter writer
// of a replay.
type discardWriter struct{}

func (discardWriter) WriteMessages(context.Context, ...kafka.Message) error { return nil }
func (discardWriter) Close() error                                          { return nil }

// currentStore returns the store of the prefix in use.
func (s *Service) currentStore() *state.Store {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.store
}

// Prefix returns the Redis key prefix the service is using: the one the
// live pointer named when it last looked (Deps.FixedPrefix: the Store's).
func (s *Service) Prefix() string { return s.currentStore().Options().Prefix }

// consumeLive runs consumer-group sessions (consume) on the prefix the live
// pointer names. A watcher reads the pointer every Deps.LiveCheckEvery;
// when it changes, the session is ended as a graceful stop would (the
// flush in progress is finished and committed, the group is left), and a
// new session starts on the new prefix, from its stored resume offsets.
// Before that, each experiment's allocation seq in the new prefix is
// raised to at least the old prefix's, so the next publication is above
// any this instance published before.
func (s *Service) consumeLive(ctx context.Context, cfg Config) error {
	if !s.follow {
		return s.consume(ctx, cfg)
	}
	for {
		var prefix string
		if err := s.retry(ctx, "live prefix", func(ctx context.Context) error {
			var err error
			prefix, err = s.root.LivePrefix(ctx)
			return err
		}); err != nil {
			if ctx.Err() != nil {
				return nil
			}
			return err
		}
		if cur := s.currentStore(); cur.Options().Prefix != prefix {
			if err := s.moveTo(ctx, cur, prefix); err != nil {
				if ctx.Err() != nil {
					return nil
				}
				return err
			}
		}
		session, endSession := context.WithCancel(ctx)
		changed := make(chan string, 1)
		var wg sync.WaitGroup
		wg.Add(1)
		go func() {
			defer wg.Done()
			s.watchLive(session, prefix, changed, endSession)
		}()
		err := s.consume(session, cfg)
		endSession()
		wg.Wait()
		switch {
		case errors.Is(err, errCrash):
			return err
		case ctx.Err() != nil:
			return nil
		}
		select {
		case next := <-changed:
			s.log.Info("live prefix changed: session on the old prefix ended; resuming on the new one",
				zap.String("from", prefix), zap.String("to", next))
		default:
			return err
		}
	}
}

// watchLive reads the live pointer every s.liveEvery until ctx ends; when
// it names another prefix than prefix, it sends the new name and calls
// end.
func (s *Service) watchLive(ctx context.Context, prefix string, changed chan<- string, end func()) {
	t := time.NewTicker(s.liveEvery)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		p, err := s.root.LivePrefix(ctx)
		if err != nil {
			if ctx.Err() == nil {
				s.log.Warn("read live prefix pointer", zap.String("key", state.LiveKey(s.root.Options().Prefix)), zap.Error(err))
			}
			continue
		}
		if p != prefix {
			changed <- p
			end()
			return
		}
	}
}

// moveTo switches the service's store from cur to prefix (between
// sessions, when no pipeline runs): it raises the allocation seqs of prefix
// above cur's and forgets what it knew of cur.
func (s *Service) moveTo(ctx context.Context, cur *state.Store, prefix string) error {
	next, err := s.root.WithPrefix(prefix)
	if err != nil {
		return fmt.Errorf("live prefix %q: %w", prefix, err)
	}
	var ids []string
	if err := s.retry(ctx, "raise allocation seqs", func(ctx context.Context) error {
		var err error
		ids, err = raiseSeqs(ctx, cur, next)
		return err
	}); err != nil {
		return fmt.Errorf("move to prefix %q: %w", prefix, err)
	}
	if err := s.retry(ctx, "list experiments", func(ctx context.Context) error {
		var err error
		ids, err = next.Experiments(ctx)
		return err
	}); err != nil {
		return fmt.Errorf("move to prefix %q: %w", prefix, err)
	}
	s.mu.Lock()
	s.store = next
	s.known = map[string]bool{}
	for _, id := range ids {
		s.known[id] = true
	}
	s.published = map[string]int64{}
	s.watermark = noTime
	s.mu.Unlock()
	s.updateExperimentsGauge()
	s.log.Info("using prefix", zap.String("prefix", prefix), zap.String("previous", cur.Options().Prefix), zap.Int("experiments", len(ids)))
	return nil
}

// raiseSeqs raises, for every experiment of from or to, the allocation seq
// in to to at least the one in from, and returns the experiments' ids.
func raiseSeqs(ctx context.Context, from, to *state.Store) ([]string, error) {
	a, err := from.Experiments(ctx)
	if err != nil {
		return nil, err
	}
	b, err := to.Experiments(ctx)
	if err != nil {
		return nil, err
	}
	ids := append(slices.Clone(a), b...)
	slices.Sort(ids)
	ids = slices.Compact(ids)
	for _, id := range ids {
		seq, err := from.AllocationSeq(ctx, id)
		if err != nil {
			return nil, err
		}
		if _, err := to.RaiseAllocationSeq(ctx, id, seq); err != nil {
			return nil, err
		}
	}
	return ids, nil
}

// Defaults of ReplayOptions.
const (
	// DefaultReplayProgressEvery is the default of ReplayOptions.ProgressEvery.
	DefaultReplayProgressEvery = 5 * time.Second
	// replayPoll is how often a replay checks whether it is done.
	replayPoll = 100 * time.Millisecond
)

// ReplayOptions configure Replay.
type ReplayOptions struct {
	// From is the event log time to start at: each partition starts at its
	// first offset whose timestamp is at or after From. Default: zero, the
	// earliest retained offset.
	From time.Time
	// Prefix is the fresh Redis key prefix to rebuild into; it must hold
	// nothing. Default: <root>.r<Unix seconds of Now>.
	Prefix string
	// Group is the replay's consumer group. Default:
	// <kafka.group>.replay.<Prefix>.
	Group string
	// DryRun plans the replay (ReplayReport.Plan) and changes nothing.
	// Default: false.
	DryRun bool
	// NoSwitch leaves the live pointer as it is after a verified replay.
	// Default: false (switch).
	NoSwitch bool
	// Progress receives a progress line at most every ProgressEvery.
	// Default: none.
	Progress io.Writer
	// ProgressEvery bounds the frequency of progress lines. Default: 5s.
	ProgressEvery time.Duration
	// Now names the default prefix (wall clock, only for a name). Default:
	// time.Now.
	Now func() time.Time
}

// WithDefaults returns o with zero fields set to their defaults, root and
// group being the configured prefix and consumer group.
func (o ReplayOptions) WithDefaults(root, group string) ReplayOptions {
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.Prefix == "" {
		o.Prefix = root + ".r" + strconv.FormatInt(o.Now().Unix(), 10)
	}
	if o.Group == "" {
		o.Group = group + ".replay." + o.Prefix
	}
	if o.ProgressEvery <= 0 {
		o.ProgressEvery = DefaultReplayProgressEvery
	}
	return o
}

// ReplayPartition is one input partition of a replay: it is applied from
// Start up to End (exclusive; the log end when the replay started).
type ReplayPartition struct {
	Topic     string `json:"topic"`
	Partition int    `json:"partition"`
	Start     int64  `json:"start"`
	End       int64  `json:"end"`
}

// ReplayPlan is what a replay does.
type ReplayPlan struct {
	// Root is the configured prefix, holder of the live pointer.
	Root string `json:"root"`
	// Live is the prefix in use (the live pointer's, or Root).
	Live string `json:"live"`
	// SourceGroup is the live consumer group.
	SourceGroup string `json:"source_group"`
	// NewPrefix is the prefix rebuilt into.
	NewPrefix string `json:"new_prefix"`
	// Group is the replay's consumer group.
	Group string `json:"group"`
	// From is the start time; zero for the earliest offsets.
	From time.Time `json:"from,omitzero"`
	// Partitions are the input partitions in topic, partition order.
	Partitions []ReplayPartition `json:"partitions"`
}

// ReplayReport is the outcome of Replay.
type ReplayReport struct {
	Plan ReplayPlan `json:"plan"`
	// Experiments is the number of experiments rebuilt (each one Loads).
	Experiments int `json:"experiments"`
	// Diff lists how the rebuilt state differs from the live prefix's,
	// applied and resume offsets left out (informational: a model or
	// configuration change makes differences expected).
	Diff []state.ArmDiff `json:"diff"`
	// Switch is the switch done; nil with DryRun or NoSwitch.
	Switch *SwitchReport `json:"switch,omitempty"`
}

// PlanReplay computes the plan of a replay of the topics of cfg from root
// (the store of the configured prefix): the live prefix, the new prefix
// and group, and each input partition's start and end offsets.
func PlanReplay(ctx context.Context, cfg Config, root *state.Store, opts ReplayOptions) (ReplayPlan, error) {
	cfg = cfg.WithDefaults()
	rootName := root.Options().Prefix
	opts = opts.WithDefaults(rootName, cfg.Kafka.Group)
	live, err := root.LivePrefix(ctx)
	if err != nil {
		return ReplayPlan{}, fmt.Errorf("plan replay: %w", err)
	}
	if opts.Prefix == rootName || opts.Prefix == live {
		return ReplayPlan{}, fmt.Errorf("plan replay: new prefix %q is the root or the live prefix", opts.Prefix)
	}
	if opts.Group == cfg.Kafka.Group {
		return ReplayPlan{}, fmt.Errorf("plan replay: replay group %q is the live group", opts.Group)
	}
	if _, err := root.WithPrefix(opts.Prefix); err != nil {
		return ReplayPlan{}, fmt.Errorf("plan replay: %w", err)
	}
	plan := ReplayPlan{Root: rootName, Live: live, SourceGroup: cfg.Kafka.Group, NewPrefix: opts.Prefix, Group: opts.Group, From: opts.From}
	dialer, err := KafkaDialer(cfg.Kafka)
	if err != nil {
		return ReplayPlan{}, fmt.Errorf("plan replay: %w", err)
	}
	for _, topic := range []string{cfg.Kafka.ClickTopic, cfg.Kafka.ConversionTopic} {
		parts, err := dialer.LookupPartitions(ctx, "tcp", cfg.Kafka.Brokers[0], topic)
		if err != nil {
			return ReplayPlan{}, fmt.Errorf("plan replay: partitions of %s: %w", topic, err)
		}
		for _, p := range parts {
			rp, err := partitionRange(ctx, dialer, cfg.Kafka.Brokers[0], topic, p.ID, opts.From)
			if err != nil {
				return ReplayPlan{}, fmt.Errorf("plan replay: %w", err)
			}
			plan.Partitions = append(plan.Partitions, rp)
		}
	}
	slices.SortFunc(plan.Partitions, func(a, b ReplayPartition) int {
		return compareTP(state.TopicPartition{Topic: a.Topic, Partition: a.Partition}, state.TopicPartition{Topic: b.Topic, Partition: b.Partition})
	})
	return plan, nil
}

// partitionRange reads a partition's start (first offset, or the first at
// or after from) and end offsets.
func partitionRange(ctx context.Context, dialer *kafka.Dialer, broker, topic string, partition int, from time.Time) (ReplayPartition, error) {
	conn, err := dialer.DialLeader(ctx, "tcp", broker, topic, partition)
	if err != nil {
		return ReplayPartition{}, fmt.Errorf("leader of %s/%d: %w", topic, partition, err)
	}
	defer conn.Close()
	first, last, err := conn.ReadOffsets()
	if err != nil {
		return ReplayPartition{}, fmt.Errorf("offsets of %s/%d: %w", topic, partition, err)
	}
	start := first
	if !from.IsZero() {
		off, err := conn.ReadOffset(from)
		if err != nil {
			return ReplayPartition{}, fmt.Errorf("offset of %s/%d at %s: %w", topic, partition, from.Format(time.RFC3339), err)
		}
		// No message at or after from: the log answers -1 (or its end).
		if off < 0 || off > last {
			off = last
		}
		start = max(off, first)
	}
	return ReplayPartition{Topic: topic, Partition: partition, Start: start, End: last}, nil
}

// Replay rebuilds the state of the click and conversion topics of cfg into
// a fresh prefix and, once verified, makes it the live one (SwitchLive).
// deps.Store is the store of the configured prefix (the root); deps.Logger,
// deps.Metrics and deps.Refit serve the replay's Service, which runs in
// its own consumer group (opts.Group) with the allocation and dead-letter
// topics disabled: allocations and their history are computed and stored
// under the new prefix only. It stops by itself once every input
// partition is applied through the log end captured at the start; the
// events read after it meanwhile are applied too, and the live service
// resumes after them from the new prefix's resume offsets. With
// opts.DryRun it returns the plan and changes nothing.
func Replay(ctx context.Context, cfg Config, deps Deps, opts ReplayOptions) (*ReplayReport, error) {
	cfg = cfg.WithDefaults()
	if err := cfg.Validate(); err != nil {
		return nil, fmt.Errorf("replay: %w", err)
	}
	root := deps.Store
	if root == nil {
		return nil, errors.New("replay: a state store is required")
	}
	opts = opts.WithDefaults(root.Options().Prefix, cfg.Kafka.Group)
	plan, err := PlanReplay(ctx, cfg, root, opts)
	if err != nil {
		return nil, err
	}
	rep := &ReplayReport{Plan: plan}
	if opts.DryRun {
		return rep, nil
	}
	target, err := root.WithPrefix(plan.NewPrefix)
	if err != nil {
		return nil, fmt.Errorf("replay: %w", err)
	}
	empty, err := target.Empty(ctx)
	if err != nil {
		return nil, fmt.Errorf("replay: %w", err)
	}
	if !empty {
		return nil, fmt.Errorf("replay: prefix %q holds state; pick a fresh one", plan.NewPrefix)
	}
	if !plan.From.IsZero() {
		for _, p := range plan.Partitions {
			if err := target.SetResume(ctx, p.Topic, p.Partition, p.Start); err != nil {
				return nil, fmt.Errorf("replay: start offsets: %w", err)
			}
		}
	}
	if err := runReplay(ctx, cfg, deps, target, plan, opts); err != nil {
		return nil, err
	}
	n, err := VerifyReplay(ctx, target, plan)
	if err != nil {
		return nil, err
	}
	rep.Experiments = n
	live, err := root.WithPrefix(plan.Live)
	if err != nil {
		return nil, fmt.Errorf("replay: %w", err)
	}
	if rep.Diff, err = diffLogical(ctx, live, target); err != nil {
		return nil, fmt.Errorf("replay: %w", err)
	}
	if opts.NoSwitch {
		return rep, nil
	}
	sw, err := SwitchLive(ctx, root, cfg.Kafka.Group, plan.NewPrefix)
	if err != nil {
		return rep, fmt.Errorf("replay: %w", err)
	}
	rep.Switch = sw
	return rep, nil
}

// runReplay runs the replay's Service on target until every partition of
// plan is applied through its end.
func runReplay(ctx context.Context, cfg Config, deps Deps, target *state.Store, plan ReplayPlan, opts ReplayOptions) error {
	rcfg := cfg
	rcfg.Kafka.Group = plan.Group
	rcfg.Redis.Prefix = plan.NewPrefix
	rcfg.Pipeline.ResetFencing = false
	svc, err := New(rcfg, Deps{
		Store: target, Logger: deps.Logger, Metrics: deps.Metrics, Refit: deps.Refit,
		NoAllocationTopic: true, NoDeadLetterTopic: true, FixedPrefix: true,
	})
	if err != nil {
		return fmt.Errorf("replay: %w", err)
	}
	runCtx, stop := context.WithCancel(ctx)
	defer stop()
	done := make(chan error, 1)
	go func() { done <- svc.Run(runCtx) }()
	started := time.Now()
	lastReport := started
	tick := time.NewTicker(replayPoll)
	defer tick.Stop()
	for {
		select {
		case err := <-done:
			if ctx.Err() != nil {
				return fmt.Errorf("replay interrupted; prefix %q is incomplete: %w", plan.NewPrefix, ctx.Err())
			}
			return fmt.Errorf("replay: consumer stopped before the end offsets: %v", err)
		case <-ctx.Done():
			<-done
			return fmt.Errorf("replay interrupted; prefix %q is incomplete: %w", plan.NewPrefix, ctx.Err())
		case <-tick.C:
		}
		prog, err := replayProgress(ctx, target, plan)
		if err != nil {
			continue // Redis trouble: the Service retries and reports it
		}
		if now := time.Now(); opts.Progress != nil && (prog.done || now.Sub(lastReport) >= opts.ProgressEvery) {
			lastReport = now
			fmt.Fprintf(opts.Progress, "replay %s: %s after %s\n", plan.NewPrefix, prog, now.Sub(started).Round(time.Second))
		}
		if prog.done {
			break
		}
	}
	stop()
	if err := <-done; err != nil {
		return fmt.Errorf("replay: stop: %w", err)
	}
	return nil
}

// replayProg is the progress of a replay.
type replayProg struct {
	applied, total int64 // messages applied of those between start and end
	partsDone      int
	parts          int
	done           bool
}

func (p replayProg) String() string {
	pct := 100.0
	if p.total > 0 {
		pct = 100 * float64(p.applied) / float64(p.total)
	}
	return fmt.Sprintf("applied %d of %d messages (%.1f%%, lag %d), %d of %d partitions through their end offsets",
		p.applied, p.total, pct, p.total-p.applied, p.partsDone, p.parts)
}

// replayProgress compares target's resume offsets with plan's ranges.
func replayProgress(ctx context.Context, target *state.Store, plan ReplayPlan) (replayProg, error) {
	var p replayProg
	p.parts = len(plan.Partitions)
	for _, rp := range plan.Partitions {
		p.total += rp.End - rp.Start
		if rp.End <= rp.Start {
			p.partsDone++
			continue
		}
		off, err := target.Resume(ctx, rp.Topic, rp.Partition)
		if errors.Is(err, state.ErrNotFound) {
			continue
		}
		if err != nil {
			return p, err
		}
		p.applied += min(max(off, rp.Start), rp.End) - rp.Start
		if off >= rp.End {
			p.partsDone++
		}
	}
	p.done = p.partsDone == p.parts
	return p, nil
}

// VerifyReplay checks a replayed prefix: every experiment Loads and every
// partition of plan was applied through its end offset. It returns the
// number of experiments.
func VerifyReplay(ctx context.Context, target *state.Store, plan ReplayPlan) (int, error) {
	prog, err := replayProgress(ctx, target, plan)
	if err != nil {
		return 0, fmt.Errorf("verify replay: %w", err)
	}
	if !prog.done {
		return 0, fmt.Errorf("verify replay: %s", prog)
	}
	n, err := loadAll(ctx, target)
	if err != nil {
		return 0, fmt.Errorf("verify replay: %w", err)
	}
	return n, nil
}

// loadAll loads every experiment of st that has arm state and returns
// the number of experiments.
func loadAll(ctx context.Context, st *state.Store) (int, error) {
	ids, err := st.Experiments(ctx)
	if err != nil {
		return 0, err
	}
	for _, id := range ids {
		// An experiment with an allocation but no applied delta has no
		// layout and nothing to load.
		snap, err := st.ExportExperiment(ctx, id)
		if errors.Is(err, state.ErrNotFound) {
			continue
		}
		if err != nil {
			return 0, fmt.Errorf("experiment %q under %q does not export: %w", id, st.Options().Prefix, err)
		}
		if snap == nil || snap.Layout == nil {
			continue
		}
		if _, err := st.Load(ctx, id); err != nil && !errors.Is(err, state.ErrNotFound) {
			return 0, fmt.Errorf("experiment %q under %q does not load: %w", id, st.Options().Prefix, err)
		}
	}
	return len(ids), nil
}

// diffLogical is state.Diff of a's and b's snapshots without applied and
// resume offsets (which record who consumed what, not the statistics).
func diffLogical(ctx context.Context, a, b *state.Store) ([]state.ArmDiff, error) {
	strip := func(st *state.Store) (*state.Snapshot, error) {
		snap, err := st.ExportExperiments(ctx)
		if err != nil {
			return nil, err
		}
		snap.Resume = nil
		for i := range snap.Experiments {
			snap.Experiments[i].Offsets = nil
		}
		return snap, nil
	}
	sa, err := strip(a)
	if err != nil {
		return nil, err
	}
	sb, err := strip(b)
	if err != nil {
		return nil, err
	}
	return state.Diff(sa, sb), nil
}

// SwitchReport is what SwitchLive did.
type SwitchReport struct {
	// From and To are the live prefix before and after.
	From string `json:"from"`
	To   string `json:"to"`
	// Seqs are, per experiment, the allocation seq To holds now (at least
	// From's): its next publication gets one more.
	Seqs map[string]int64 `json:"seqs"`
	// FencingBase is the live group's fencing base under To.
	FencingBase int32 `json:"fencing_base"`
}

// SwitchLive makes prefix the live one under root, for consumer group
// group: it checks that every experiment of prefix Loads, raises each
// experiment's allocation seq in prefix to at least the live prefix's (so
// that readers, which keep only a seq above the last one they saw, accept
// prefix's next publication), raises group's fencing base under prefix
// above the generations other groups (the replay's) recorded there, and
// then sets the live pointer in one command. Running services follow it
// (see Service). Switching to the live prefix changes nothing. Switching
// back works the same way.
func SwitchLive(ctx context.Context, root *state.Store, group, prefix string) (*SwitchReport, error) {
	from, err := root.LivePrefix(ctx)
	if err != nil {
		return nil, fmt.Errorf("switch: %w", err)
	}
	rep := &SwitchReport{From: from, To: prefix, Seqs: map[string]int64{}}
	if from == prefix {
		return rep, nil
	}
	fromStore, err := root.WithPrefix(from)
	if err != nil {
		return nil, fmt.Errorf("switch: %w", err)
	}
	to, err := root.WithPrefix(prefix)
	if err != nil {
		return nil, fmt.Errorf("switch: %w", err)
	}
	if _, err := loadAll(ctx, to); err != nil {
		return nil, fmt.Errorf("switch: %w", err)
	}
	ids, err := raiseSeqs(ctx, fromStore, to)
	if err != nil {
		return nil, fmt.Errorf("switch: raise allocation seqs: %w", err)
	}
	for _, id := range ids {
		if rep.Seqs[id], err = to.AllocationSeq(ctx, id); err != nil {
			return nil, fmt.Errorf("switch: %w", err)
		}
	}
	// Kafka generation ids start at 1, so base + generation then exceeds
	// every generation recorded under prefix.
	if rep.FencingBase, err = to.ResetFencing(ctx, group, 1); err != nil {
		return nil, fmt.Errorf("switch: fencing base: %w", err)
	}
	if err := root.SetLivePrefix(ctx, prefix); err != nil {
		return nil, fmt.Errorf("switch: %w", err)
	}
	return rep, nil
}
