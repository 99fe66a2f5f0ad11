package state

import (
	"context"
	"errors"
	"fmt"
	"strings"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"
)

// Defaults of Options, applied by WithDefaults to zero fields.
const (
	DefaultPrefix           = "ripen"
	DefaultClickTTLSlack    = time.Hour
	DefaultOrphanTTL        = time.Hour
	DefaultMaxParkedOrphans = 100_000
	DefaultCompactAttempts  = 8
	DefaultCompactFields    = 64
	DefaultCompactBytes     = 16 << 10
	DefaultIndexGenerations = 4
)

// Options configure a Store.
type Options struct {
	// Prefix starts every key, so that several deployments can share one
	// Redis. It must not contain '{' or '}'. Default: "ripen".
	Prefix string
	// ClickTTLSlack is how long past the attribution window click index
	// entries and conversion markers live: a margin for conversions that
	// come later than the pipeline's lateness allows. Index entries are
	// retired by event time (RetireClickIndex), markers expire by
	// wall-clock TTL (window + slack). Default: 1h.
	ClickTTLSlack time.Duration
	// OrphanTTL is the wall-clock lifetime of a parked orphan conversion,
	// a safety net behind the event-time deadline sweep (DueOrphans); keep
	// it longer than the expected wait for late clicks. Default: 1h.
	OrphanTTL time.Duration
	// MaxParkedOrphans caps the orphans parked per conversion partition;
	// a conversion that would exceed it is reported as LookupCapExceeded.
	// Default: 100000.
	MaxParkedOrphans int
	// CompactAttempts bounds the compare-and-set attempts of one Compact
	// call. Default: 8.
	CompactAttempts int
	// CompactFields and CompactBytes bound an arm hash between
	// compactions: Apply compacts an arm whose hash has more than
	// CompactFields fields, or whose records (one per Apply since the last
	// compaction) hold more than CompactBytes bytes. Defaults: 64 and
	// 16384.
	CompactFields int
	CompactBytes  int
	// IndexGenerations is the number of click index generations per
	// horizon (the longest attribution window) when an index is created:
	// more generations keep entries closer to their window (an entry is
	// gone at most one generation after it) but make a conversion look in
	// more of them. Default: 4.
	IndexGenerations int
}

// WithDefaults returns o with every zero field set to its default.
func (o Options) WithDefaults() Options {
	if o.Prefix == "" {
		o.Prefix = DefaultPrefix
	}
	if o.ClickTTLSlack == 0 {
		o.ClickTTLSlack = DefaultClickTTLSlack
	}
	if o.OrphanTTL == 0 {
		o.OrphanTTL = DefaultOrphanTTL
	}
	if o.MaxParkedOrphans == 0 {
		o.MaxParkedOrphans = DefaultMaxParkedOrphans
	}
	if o.CompactAttempts == 0 {
		o.CompactAttempts = DefaultCompactAttempts
	}
	if o.CompactFields == 0 {
		o.CompactFields = DefaultCompactFields
	}
	if o.CompactBytes == 0 {
		o.CompactBytes = DefaultCompactBytes
	}
	if o.IndexGenerations == 0 {
		o.IndexGenerations = DefaultIndexGenerations
	}
	return o
}

// Validate reports what is wrong with o, after defaults are applied.
func (o Options) Validate() error {
	o = o.WithDefaults()
	var errs []error
	if strings.ContainsAny(o.Prefix, "{}") {
		errs = append(errs, fmt.Errorf("state options: prefix %q must not contain '{' or '}'", o.Prefix))
	}
	if o.ClickTTLSlack < time.Millisecond {
		errs = append(errs, fmt.Errorf("state options: click TTL slack %v must be at least 1ms", o.ClickTTLSlack))
	}
	if o.OrphanTTL < time.Millisecond {
		errs = append(errs, fmt.Errorf("state options: orphan TTL %v must be at least 1ms", o.OrphanTTL))
	}
	if o.MaxParkedOrphans < 1 {
		errs = append(errs, fmt.Errorf("state options: max parked orphans %d must be at least 1", o.MaxParkedOrphans))
	}
	if o.CompactAttempts < 1 {
		errs = append(errs, fmt.Errorf("state options: compact attempts %d must be at least 1", o.CompactAttempts))
	}
	if o.CompactFields < 4 {
		errs = append(errs, fmt.Errorf("state options: compact fields %d must be at least 4", o.CompactFields))
	}
	if o.CompactBytes < 1 {
		errs = append(errs, fmt.Errorf("state options: compact bytes %d must be at least 1", o.CompactBytes))
	}
	if o.IndexGenerations < 1 || o.IndexGenerations > 1000 {
		errs = append(errs, fmt.Errorf("state options: index generations %d must be in [1, 1000]", o.IndexGenerations))
	}
	return errors.Join(errs...)
}

// Store reads and writes Ripen's state in Redis. It is safe for concurrent
// use; several Stores (in several processes) may share one Redis.
type Store struct {
	rdb  redis.UniversalClient
	opts Options
	keys keys

	// registered holds the experiments this Store has added to the
	// discovery set, to save a round trip per Apply.
	registered sync.Map
	// ix caches the click index descriptor and dictionary.
	ix indexState
}

// New returns a Store on rdb (a *redis.Client, *redis.ClusterClient or any
// other UniversalClient). It does not contact Redis.
func New(rdb redis.UniversalClient, opts Options) (*Store, error) {
	if rdb == nil {
		return nil, permanent("new store", fmt.Errorf("%w: nil redis client", ErrInvalid))
	}
	if err := opts.Validate(); err != nil {
		return nil, permanent("new store", fmt.Errorf("%w: %w", ErrInvalid, err))
	}
	opts = opts.WithDefaults()
	return &Store{rdb: rdb, opts: opts, keys: keys{prefix: opts.Prefix}}, nil
}

// Options returns the Store's options, defaults applied.
func (s *Store) Options() Options { return s.opts }

// Experiments returns the ids of every experiment with stored state, sorted.
func (s *Store) Experiments(ctx context.Context) ([]string, error) {
	ids, err := s.rdb.SMembers(ctx, s.keys.experiments()).Result()
	if err != nil {
		return nil, redisFailure("list experiments", err)
	}
	sortStrings(ids)
	return ids, nil
}

// register adds an experiment to the discovery set, once per Store. It runs
// before the experiment's first write, so that no stored experiment is ever
// missing from Experiments.
func (s *Store) register(ctx context.Context, experiment string) error {
	if _, ok := s.registered.Load(experiment); ok {
		return nil
	}
	if err := s.rdb.SAdd(ctx, s.keys.experiments(), experiment).Err(); err != nil {
		return err
	}
	s.registered.Store(experiment, struct{}{})
	return nil
}

// ArmMemory returns the Redis memory of an arm's hash (MEMORY USAGE with
// every field sampled), 0 if the arm has none.
func (s *Store) ArmMemory(ctx context.Context, experiment, arm string) (int64, error) {
	if err := validExperiment(experiment); err != nil {
		return 0, permanent("arm memory", err)
	}
	n, err := s.rdb.MemoryUsage(ctx, s.keys.arm(experiment, arm), 0).Result()
	switch {
	case errors.Is(err, redis.Nil):
		return 0, nil
	case err != nil:
		return 0, redisFailure("arm memory", fmt.Errorf("experiment %q arm %q: %w", experiment, arm, err))
	}
	return n, nil
}

// SetResume records the offset a consumer of topic/partition resumes from
// (the next offset to read). It is only a lower bound: the per-experiment
// offset records make redelivery harmless. Last writer wins.
func (s *Store) SetResume(ctx context.Context, topic string, partition int, offset int64) error {
	if err := validPartition(topic, partition); err != nil {
		return permanent("set resume", err)
	}
	if err := s.rdb.Set(ctx, s.keys.resume(topic, partition), offset, 0).Err(); err != nil {
		return redisFailure("set resume", fmt.Errorf("%s/%d: %w", topic, partition, err))
	}
	return nil
}

// Resume returns the offset recorded by SetResume for topic/partition, or
// an error matching ErrNotFound if none was.
func (s *Store) Resume(ctx context.Context, topic string, partition int) (int64, error) {
	if err := validPartition(topic, partition); err != nil {
		return 0, permanent("resume", err)
	}
	v, err := s.rdb.Get(ctx, s.keys.resume(topic, partition)).Int64()
	switch {
	case errors.Is(err, redis.Nil):
		return 0, permanent("resume", fmt.Errorf("%s/%d: %w", topic, partition, ErrNotFound))
	case err != nil:
		return 0, redisFailure("resume", fmt.Errorf("%s/%d: %w", topic, partition, err))
	}
	return v, nil
}

// SaveAllocation stores allocation (JSON, opaque here) as the experiment's
// latest and returns its sequence number, one more than the previous one,
// both in one atomic step.
func (s *Store) SaveAllocation(ctx context.Context, experiment string, allocation []byte) (int64, error) {
	if err := validExperiment(experiment); err != nil {
		return 0, permanent("save allocation", err)
	}
	if err := s.register(ctx, experiment); err != nil {
		return 0, redisFailure("save allocation", fmt.Errorf("register %q: %w", experiment, err))
	}
	seq, err := allocScript.Run(ctx, s.rdb, []string{s.keys.meta(experiment)}, allocation).Int64()
	if err != nil {
		return 0, redisFailure("save allocation", fmt.Errorf("experiment %q: %w", experiment, err))
	}
	return seq, nil
}

// LatestAllocation returns the experiment's latest allocation and its
// sequence number, or an error matching ErrNotFound if none was saved.
func (s *Store) LatestAllocation(ctx context.Context, experiment string) (seq int64, allocation []byte, err error) {
	if err := validExperiment(experiment); err != nil {
		return 0, nil, permanent("latest allocation", err)
	}
	vals, err := s.rdb.HMGet(ctx, s.keys.meta(experiment), "seq", "alloc").Result()
	if err != nil {
		return 0, nil, redisFailure("latest allocation", fmt.Errorf("experiment %q: %w", experiment, err))
	}
	seqS, ok1 := vals[0].(string)
	alloc, ok2 := vals[1].(string)
	if !ok1 || !ok2 {
		return 0, nil, permanent("latest allocation", fmt.Errorf("experiment %q: %w", experiment, ErrNotFound))
	}
	seq, err = parseInt(seqS)
	if err != nil {
		return 0, nil, permanent("latest allocation", fmt.Errorf("experiment %q: sequence: %w", experiment, err))
	}
	return seq, []byte(alloc), nil
}

// fence is the fencing base of a consumer group (see FencingBase).
func (k keys) fence(group string) string { return k.prefix + ":fence:" + group }

// FencingBase returns the fencing base of consumer group: a number the
// consumers add to Kafka generation ids to form the writer epoch recorded
// with applied offsets (0 unless ResetFencing raised it).
func (s *Store) FencingBase(ctx context.Context, group string) (int32, error) {
	v, err := s.rdb.Get(ctx, s.keys.fence(group)).Int64()
	switch {
	case errors.Is(err, redis.Nil):
		return 0, nil
	case err != nil:
		return 0, redisFailure("fencing base", fmt.Errorf("group %q: %w", group, err))
	}
	return int32(v), nil
}

// ResetFencing raises the fencing base of group so that generation gen's
// epoch (base + gen) exceeds every generation recorded with the applied
// offsets of any experiment, and returns the new base. It is for a
// consumer group that was recreated, whose generation ids restarted below
// the recorded ones, so that every write would be refused as fenced. The
// risk: a writer that really is stale (a consumer of the old group still
// running, or another deployment sharing the prefix) is no longer fenced
// off, and its writes could count events twice; stop them first. The base
// never decreases.
func (s *Store) ResetFencing(ctx context.Context, group string, gen int32) (int32, error) {
	const op = "reset fencing"
	ids, err := s.Experiments(ctx)
	if err != nil {
		return 0, err
	}
	var top int32
	for _, id := range ids {
		offs, err := s.Offsets(ctx, id)
		if err != nil {
			return 0, err
		}
		for _, o := range offs {
			top = max(top, o.Generation)
		}
	}
	cur, err := s.FencingBase(ctx, group)
	if err != nil {
		return 0, err
	}
	base := max(cur, top+1-gen, 0)
	if err := s.rdb.Set(ctx, s.keys.fence(group), int64(base), 0).Err(); err != nil {
		return 0, redisFailure(op, fmt.Errorf("group %q: %w", group, err))
	}
	return base, nil
}
