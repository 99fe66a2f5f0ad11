package state

import (
	"bytes"
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"

	"ripen/estimator"
)

// Snapshots: a portable JSON form of the logical state under a prefix, for
// backups, moving state between Redis deployments and checking that two
// deployments agree (Digest, Diff).
//
// A snapshot holds, per experiment, its layout, watermark, the applied
// offsets per partition, the latest allocation and its sequence number, and
// every arm's state in canonical form at the watermark; and the resume
// offset of every partition. It leaves out by default the join buffers
// (click index entries, parked orphan conversions and their due sets, and
// conversion markers): they are short-lived, expire with the attribution
// window (plus slack) or the orphan TTL, and are rebuilt by the traffic of
// the next window; ExportOptions.JoinBuffers copies them too, as Redis
// DUMP payloads with their remaining TTL.

// SnapshotFormat is the Format of the snapshots this package writes and the
// only one Import accepts.
const SnapshotFormat = 1

// ErrNotEmpty refuses an Import into a prefix that already holds state,
// unless ImportOptions.Force is set.
var ErrNotEmpty = errors.New("target prefix holds state")

// Snapshot is the logical state under one prefix. Export writes it with
// experiments, arms and partitions sorted; Digest and Diff do not depend on
// any order.
type Snapshot struct {
	// Format is SnapshotFormat.
	Format int `json:"format"`
	// Prefix is the prefix the snapshot was exported from; informational,
	// Import writes under its own Store's prefix.
	Prefix string `json:"prefix,omitempty"`
	// Experiments are the experiments, sorted by id.
	Experiments []ExperimentSnapshot `json:"experiments"`
	// Resume are the per-partition resume offsets (SetResume).
	Resume []ResumeOffset `json:"resume,omitempty"`
	// JoinBuffers are the join buffer keys, only with
	// ExportOptions.JoinBuffers.
	JoinBuffers []BufferKey `json:"join_buffers,omitempty"`
}

// ExperimentSnapshot is one experiment of a Snapshot.
type ExperimentSnapshot struct {
	// ID is the experiment id.
	ID string `json:"id"`
	// Layout is the experiment's layout; nil for an experiment that has an
	// allocation but no applied delta.
	Layout *estimator.Layout `json:"layout,omitempty"`
	// Watermark is the stored watermark (Unix ms).
	Watermark int64 `json:"watermark"`
	// Arms are the arms, sorted by name.
	Arms []ArmRecord `json:"arms,omitempty"`
	// Offsets are the applied offsets, sorted by topic and partition.
	Offsets []PartitionOffset `json:"offsets,omitempty"`
	// AllocationSeq is the sequence number of Allocation; 0 if none.
	AllocationSeq int64 `json:"allocation_seq,omitempty"`
	// Allocation is the latest allocation (JSON, as SaveAllocation stored
	// it); empty if none.
	Allocation json.RawMessage `json:"allocation,omitempty"`
}

// ArmRecord is one arm of an ExperimentSnapshot.
type ArmRecord struct {
	// Arm is the arm name.
	Arm string `json:"arm"`
	// State is the arm's state, canonical at the experiment's watermark,
	// as Load returns it.
	State estimator.ArmSnapshot `json:"state"`
	// Held are conversions stored for pending buckets but held back from
	// State because their clicks have not landed yet (Experiment.Held),
	// by canonical bucket.
	Held []HeldBucket `json:"held,omitempty"`
	// HeldMatured counts held-back conversions of matured clicks.
	HeldMatured uint64 `json:"held_matured,omitempty"`
}

// HeldBucket counts the held-back conversions of one canonical bucket.
type HeldBucket struct {
	Level       uint8  `json:"level"`
	Index       int64  `json:"index"`
	Conversions uint64 `json:"conversions"`
}

// PartitionOffset is the last offset of a partition applied to an
// experiment and the generation that applied it.
type PartitionOffset struct {
	Topic      string `json:"topic"`
	Partition  int    `json:"partition"`
	Generation int32  `json:"generation"`
	Offset     int64  `json:"offset"`
}

// ResumeOffset is the offset a consumer of a partition resumes from.
type ResumeOffset struct {
	Topic     string `json:"topic"`
	Partition int    `json:"partition"`
	Offset    int64  `json:"offset"`
}

// BufferKey is one join buffer key in Redis DUMP form.
type BufferKey struct {
	// Key is the key name without the prefix (it starts with ":{").
	Key string `json:"key"`
	// TTLMs is the remaining lifetime at export in milliseconds; 0 for
	// none.
	TTLMs int64 `json:"ttl_ms"`
	// Dump is the DUMP payload (base64 in JSON); RESTORE needs a server of
	// the same or a newer version.
	Dump []byte `json:"dump"`
}

// ExportOptions configure ExportWith.
type ExportOptions struct {
	// JoinBuffers also copies the click index, parked orphans, their due
	// sets and the conversion markers. Default: false.
	JoinBuffers bool
}

// ImportOptions configure ImportWith.
type ImportOptions struct {
	// Force imports into a prefix that holds state: every experiment of the
	// snapshot replaces the stored one of the same id (its state keys are
	// deleted first), resume offsets and join buffer keys of the snapshot
	// overwrite stored ones, and everything else is left as it is.
	// Default: false (refuse with ErrNotEmpty).
	Force bool
}

// Export writes the snapshot of ExportExperiments to w as indented JSON.
func (s *Store) Export(ctx context.Context, w io.Writer) error {
	snap, err := s.ExportExperiments(ctx)
	if err != nil {
		return err
	}
	return WriteSnapshot(w, snap)
}

// ExportExperiments returns the logical state under the Store's prefix,
// without join buffers. Each experiment is read in one atomic script call;
// experiments are read one after another, so a snapshot taken while
// consumers write is consistent per experiment, not across experiments.
func (s *Store) ExportExperiments(ctx context.Context) (*Snapshot, error) {
	return s.ExportWith(ctx, ExportOptions{})
}

// ExportWith is ExportExperiments with options.
func (s *Store) ExportWith(ctx context.Context, opts ExportOptions) (*Snapshot, error) {
	const op = "export"
	ids, err := s.Experiments(ctx)
	if err != nil {
		return nil, err
	}
	snap := &Snapshot{Format: SnapshotFormat, Prefix: s.opts.Prefix, Experiments: []ExperimentSnapshot{}}
	for _, id := range ids {
		e, ok, err := s.exportExperiment(ctx, id)
		if err != nil {
			return nil, err
		}
		if ok {
			snap.Experiments = append(snap.Experiments, *e)
		}
	}
	if snap.Resume, err = s.ResumeOffsets(ctx); err != nil {
		return nil, err
	}
	if opts.JoinBuffers {
		if snap.JoinBuffers, err = s.exportBuffers(ctx); err != nil {
			return nil, redisFailure(op, fmt.Errorf("join buffers: %w", err))
		}
	}
	return snap, nil
}

// ExportExperiment returns the snapshot of one experiment, read in one
// atomic script call, or an error matching ErrNotFound if nothing was
// stored for it.
func (s *Store) ExportExperiment(ctx context.Context, id string) (*ExperimentSnapshot, error) {
	if err := validExperiment(id); err != nil {
		return nil, permanent("export", err)
	}
	e, ok, err := s.exportExperiment(ctx, id)
	if err != nil {
		return nil, err
	}
	if !ok {
		return nil, permanent("export", fmt.Errorf("experiment %q: %w", id, ErrNotFound))
	}
	return e, nil
}

// exportExperiment reads one experiment atomically; ok is false if it has
// no meta hash (registered, but nothing written yet).
func (s *Store) exportExperiment(ctx context.Context, id string) (*ExperimentSnapshot, bool, error) {
	const op = "export"
	for range loadAttempts {
		names, reply, err := s.runLoad(ctx, op, id)
		if err != nil {
			return nil, false, err
		}
		status, _ := reply[0].(string)
		switch status {
		case "retry":
			continue
		case "missing":
			return nil, false, nil
		case "ok":
		default:
			return nil, false, permanent(op, fmt.Errorf("experiment %q: %w: load status %q", id, ErrCorrupt, status))
		}
		if len(reply) != 3+len(names) {
			return nil, false, permanent(op, fmt.Errorf("experiment %q: %w: load reply of %d elements", id, ErrCorrupt, len(reply)))
		}
		e, err := snapshotExperiment(id, names, reply[1:])
		if err != nil {
			return nil, false, permanent(op, fmt.Errorf("experiment %q: %w", id, err))
		}
		return e, true, nil
	}
	return nil, false, &Error{Op: op, Retriable: true, Err: fmt.Errorf("experiment %q: %w: arms kept changing", id, ErrConflict)}
}

// snapshotExperiment builds an experiment's snapshot from the load
// script's meta, offsets and arm hashes.
func snapshotExperiment(id string, names []string, parts []any) (*ExperimentSnapshot, error) {
	meta, err := flatHash(parts[0])
	if err != nil {
		return nil, fmt.Errorf("meta: %w", err)
	}
	e := &ExperimentSnapshot{ID: id}
	if a, ok := meta["alloc"]; ok {
		if !json.Valid([]byte(a)) {
			return nil, fmt.Errorf("%w: allocation is not JSON", ErrCorrupt)
		}
		e.Allocation = json.RawMessage(a)
		if e.AllocationSeq, err = parseInt(meta["seq"]); err != nil {
			return nil, fmt.Errorf("allocation sequence: %w", err)
		}
	}
	if _, ok := meta["layout"]; !ok {
		// Only an allocation was saved.
		if len(names) > 0 {
			return nil, fmt.Errorf("%w: %d arms but no layout", ErrCorrupt, len(names))
		}
		return e, nil
	}
	layout, wm, err := parseMeta(meta)
	if err != nil {
		return nil, err
	}
	e.Layout, e.Watermark = &layout, wm
	h, err := flatHash(parts[1])
	if err != nil {
		return nil, fmt.Errorf("offsets: %w", err)
	}
	offs, err := parseOffsets(h)
	if err != nil {
		return nil, err
	}
	e.Offsets = sortedOffsets(offs)
	for i, name := range names {
		c, err := canonicalArm(layout, wm, name, parts[2+i])
		if err != nil {
			return nil, err
		}
		rec, err := c.record(name, layout, wm)
		if err != nil {
			return nil, fmt.Errorf("arm %q: %w", name, err)
		}
		e.Arms = append(e.Arms, rec)
	}
	return e, nil
}

func sortedOffsets(offs map[TopicPartition]AppliedOffset) []PartitionOffset {
	out := make([]PartitionOffset, 0, len(offs))
	for tp, o := range offs {
		out = append(out, PartitionOffset{Topic: tp.Topic, Partition: tp.Partition, Generation: o.Generation, Offset: o.Offset})
	}
	slices.SortFunc(out, func(a, b PartitionOffset) int {
		return cmp.Or(cmp.Compare(a.Topic, b.Topic), cmp.Compare(a.Partition, b.Partition))
	})
	return out
}

// record turns canonical counts into an ArmRecord: the state Load builds
// and the conversions it holds back.
func (c armCounts) record(name string, l estimator.Layout, wm int64) (ArmRecord, error) {
	st, _, err := c.state(l, wm)
	if err != nil {
		return ArmRecord{}, err
	}
	rec := ArmRecord{Arm: name, State: st.Snapshot()}
	for _, k := range sortedBucketKeys(c.converted) {
		if n, clicks := c.converted[k], c.clicks[k]; n > clicks {
			rec.Held = append(rec.Held, HeldBucket{Level: k.Level, Index: k.Index, Conversions: n - clicks})
		}
	}
	rec.HeldMatured = c.maturedConversions - min(c.maturedConversions, c.maturedClicks)
	return rec, nil
}

// fieldsOf returns the arm hash that holds rec's counts (not necessarily
// canonical: rec may come from a hand-edited file).
func fieldsOf(rec ArmRecord) (map[string]string, error) {
	sums := map[string]uint64{}
	var err error
	add := func(f string, n uint64) {
		if n == 0 {
			return
		}
		v := sums[f] + n
		if v < n || v > 1<<63-1 {
			err = fmt.Errorf("%w: arm %q: count of %s overflows", ErrInvalid, rec.Arm, f)
		}
		sums[f] = v
	}
	st := rec.State
	for _, b := range st.Buckets {
		add(bucketField('b', b.BucketKey), b.Clicks)
		add(bucketField('v', b.BucketKey), b.Converted)
	}
	for _, h := range rec.Held {
		add(bucketField('v', estimator.BucketKey{Level: h.Level, Index: h.Index}), h.Conversions)
	}
	add("mc", st.MaturedClicks)
	add("mv", st.MaturedConversions)
	add("mv", rec.HeldMatured)
	for i, n := range st.Delays {
		add("d:"+strconv.Itoa(i), n)
	}
	add("dn", st.DelayCount)
	add("ds", st.DelaySumMs)
	if err != nil {
		return nil, err
	}
	h := make(map[string]string, len(sums))
	for f, n := range sums {
		h[f] = strconv.FormatUint(n, 10)
	}
	return h, nil
}

// canonExperiment is an experiment snapshot with every arm in canonical
// counts, the common form of Import, Digest and Diff.
type canonExperiment struct {
	e      *ExperimentSnapshot
	layout estimator.Layout
	arms   map[string]armCounts
}

// canonical checks e and re-keys every arm to canonical buckets at its
// watermark, as Load would after an Import.
func (e *ExperimentSnapshot) canonical() (canonExperiment, error) {
	ce := canonExperiment{e: e, arms: make(map[string]armCounts, len(e.Arms))}
	if err := validExperiment(e.ID); err != nil {
		return ce, err
	}
	if len(e.Allocation) > 0 && !json.Valid(e.Allocation) {
		return ce, fmt.Errorf("%w: experiment %q: allocation is not JSON", ErrInvalid, e.ID)
	}
	if e.Layout == nil {
		if len(e.Arms) > 0 || len(e.Offsets) > 0 {
			return ce, fmt.Errorf("%w: experiment %q: arms or offsets without a layout", ErrInvalid, e.ID)
		}
		return ce, nil
	}
	l := e.Layout.WithDefaults()
	if err := l.Validate(); err != nil {
		return ce, fmt.Errorf("%w: experiment %q: %w", ErrInvalid, e.ID, err)
	}
	if e.Watermark <= -maxExact || e.Watermark >= maxExact {
		return ce, fmt.Errorf("%w: experiment %q: watermark %d out of range", ErrInvalid, e.ID, e.Watermark)
	}
	ce.layout = l
	seen := map[TopicPartition]bool{}
	for _, o := range e.Offsets {
		if err := validPartition(o.Topic, o.Partition); err != nil {
			return ce, fmt.Errorf("experiment %q: %w", e.ID, err)
		}
		tp := TopicPartition{o.Topic, o.Partition}
		if seen[tp] {
			return ce, fmt.Errorf("%w: experiment %q: two offsets for %s", ErrInvalid, e.ID, tp)
		}
		seen[tp] = true
		if o.Offset < 0 || o.Offset >= maxExact {
			return ce, fmt.Errorf("%w: experiment %q: offset %d of %s out of range", ErrInvalid, e.ID, o.Offset, tp)
		}
	}
	for _, rec := range e.Arms {
		if rec.Arm == "" {
			return ce, fmt.Errorf("%w: experiment %q: empty arm name", ErrInvalid, e.ID)
		}
		if _, dup := ce.arms[rec.Arm]; dup {
			return ce, fmt.Errorf("%w: experiment %q: arm %q listed twice", ErrInvalid, e.ID, rec.Arm)
		}
		if rec.State.Layout.WithDefaults() != l || rec.State.Watermark != e.Watermark {
			return ce, fmt.Errorf("%w: experiment %q arm %q: layout or watermark differs from the experiment's", ErrInvalid, e.ID, rec.Arm)
		}
		if _, err := estimator.FromSnapshot(rec.State); err != nil {
			return ce, fmt.Errorf("%w: experiment %q arm %q: %w", ErrInvalid, e.ID, rec.Arm, err)
		}
		h, err := fieldsOf(rec)
		if err != nil {
			return ce, fmt.Errorf("experiment %q: %w", e.ID, err)
		}
		c, err := canonicalize(l, e.Watermark, h)
		if err != nil {
			return ce, fmt.Errorf("%w: experiment %q arm %q: %w", ErrInvalid, e.ID, rec.Arm, err)
		}
		ce.arms[rec.Arm] = c
	}
	return ce, nil
}

// Validate reports what keeps snap from being imported.
func (snap *Snapshot) Validate() error {
	if snap == nil {
		return fmt.Errorf("%w: nil snapshot", ErrInvalid)
	}
	if snap.Format != SnapshotFormat {
		return fmt.Errorf("%w: snapshot format %d, want %d", ErrInvalid, snap.Format, SnapshotFormat)
	}
	ids := map[string]bool{}
	for i := range snap.Experiments {
		e := &snap.Experiments[i]
		if ids[e.ID] {
			return fmt.Errorf("%w: experiment %q listed twice", ErrInvalid, e.ID)
		}
		ids[e.ID] = true
		if _, err := e.canonical(); err != nil {
			return err
		}
	}
	parts := map[TopicPartition]bool{}
	for _, r := range snap.Resume {
		if err := validPartition(r.Topic, r.Partition); err != nil {
			return fmt.Errorf("resume: %w", err)
		}
		tp := TopicPartition{r.Topic, r.Partition}
		if parts[tp] {
			return fmt.Errorf("%w: resume offset of %s listed twice", ErrInvalid, tp)
		}
		parts[tp] = true
	}
	for _, b := range snap.JoinBuffers {
		if !strings.HasPrefix(b.Key, ":{") || b.TTLMs < 0 || len(b.Dump) == 0 {
			return fmt.Errorf("%w: join buffer key %q", ErrInvalid, b.Key)
		}
	}
	return nil
}

// Import writes snap under the Store's prefix, which must hold no state
// (else an error matching ErrNotEmpty). See ImportWith.
func (s *Store) Import(ctx context.Context, snap *Snapshot) error {
	return s.ImportWith(ctx, snap, ImportOptions{})
}

// ImportWith writes snap under the Store's prefix. Arms are written in
// canonical form, so a later Export returns the same Digest. Each
// experiment is written in one MULTI/EXEC transaction (its keys share a
// hash slot); experiments, resume offsets and join buffers one after
// another, so consumers must be stopped while importing.
func (s *Store) ImportWith(ctx context.Context, snap *Snapshot, opts ImportOptions) error {
	const op = "import"
	if err := snap.Validate(); err != nil {
		return permanent(op, err)
	}
	if !opts.Force {
		empty, err := s.isEmpty(ctx)
		if err != nil {
			return redisFailure(op, err)
		}
		if !empty {
			return permanent(op, fmt.Errorf("prefix %q: %w (use Force to overwrite)", s.opts.Prefix, ErrNotEmpty))
		}
	}
	for i := range snap.Experiments {
		if err := s.importExperiment(ctx, &snap.Experiments[i], opts.Force); err != nil {
			return err
		}
	}
	for _, r := range snap.Resume {
		if err := s.SetResume(ctx, r.Topic, r.Partition, r.Offset); err != nil {
			return err
		}
	}
	for _, b := range snap.JoinBuffers {
		key := s.opts.Prefix + b.Key
		var err error
		if opts.Force {
			err = s.rdb.RestoreReplace(ctx, key, msDuration(b.TTLMs), string(b.Dump)).Err()
		} else {
			err = s.rdb.Restore(ctx, key, msDuration(b.TTLMs), string(b.Dump)).Err()
		}
		if err != nil {
			return redisFailure(op, fmt.Errorf("join buffer %q: %w", b.Key, err))
		}
	}
	return nil
}

// importExperiment writes one experiment in one transaction.
func (s *Store) importExperiment(ctx context.Context, e *ExperimentSnapshot, force bool) error {
	const op = "import"
	ce, err := e.canonical()
	if err != nil {
		return permanent(op, err)
	}
	id := e.ID
	var stale []string
	if force {
		names, err := s.rdb.SMembers(ctx, s.keys.arms(id)).Result()
		if err != nil {
			return redisFailure(op, fmt.Errorf("experiment %q: arms: %w", id, err))
		}
		stale = append(stale, s.keys.meta(id), s.keys.arms(id), s.keys.offsets(id))
		for _, n := range names {
			stale = append(stale, s.keys.arm(id, n))
		}
	}
	meta := map[string]any{}
	if len(e.Allocation) > 0 {
		var buf bytes.Buffer
		if err := json.Compact(&buf, e.Allocation); err != nil {
			return permanent(op, fmt.Errorf("%w: experiment %q: allocation: %w", ErrInvalid, id, err))
		}
		meta["alloc"], meta["seq"] = buf.String(), e.AllocationSeq
	}
	if e.Layout != nil {
		meta["layout"], meta["wm"], meta["arms"] = encodeLayout(ce.layout), e.Watermark, len(e.Arms)
	}
	if len(meta) == 0 {
		return nil // nothing to store
	}
	if err := s.register(ctx, id); err != nil {
		return redisFailure(op, fmt.Errorf("register %q: %w", id, err))
	}
	_, err = s.rdb.TxPipelined(ctx, func(p redis.Pipeliner) error {
		if len(stale) > 0 {
			p.Del(ctx, stale...)
		}
		p.HSet(ctx, s.keys.meta(id), meta)
		if len(e.Offsets) > 0 {
			offs := map[string]any{}
			for _, o := range e.Offsets {
				offs[partitionField(o.Topic, o.Partition)] = strconv.FormatInt(int64(o.Generation), 10) + ":" + strconv.FormatInt(o.Offset, 10)
			}
			p.HSet(ctx, s.keys.offsets(id), offs)
		}
		if len(e.Arms) > 0 {
			names := make([]any, len(e.Arms))
			for i, rec := range e.Arms {
				names[i] = rec.Arm
			}
			p.SAdd(ctx, s.keys.arms(id), names...)
		}
		for _, rec := range e.Arms {
			if f := ce.arms[rec.Arm].fields(); len(f) > 0 {
				p.HSet(ctx, s.keys.arm(id, rec.Arm), f)
			}
		}
		return nil
	})
	if err != nil {
		return redisFailure(op, fmt.Errorf("experiment %q: %w", id, err))
	}
	return nil
}

// isEmpty reports whether the prefix holds no experiment and no key of the
// layout.
func (s *Store) isEmpty(ctx context.Context) (bool, error) {
	n, err := s.rdb.Exists(ctx, s.keys.experiments()).Result()
	if err != nil {
		return false, fmt.Errorf("experiments set: %w", err)
	}
	if n > 0 {
		return false, nil
	}
	found := false
	err = s.scan(ctx, globEscape(s.opts.Prefix)+":{*", func(string) bool {
		found = true
		return false
	})
	return !found, err
}

// ResumeOffsets returns every resume offset recorded under the prefix
// (SetResume), sorted by topic and partition. It scans the key space.
func (s *Store) ResumeOffsets(ctx context.Context) ([]ResumeOffset, error) {
	const op = "resume offsets"
	start, end := s.opts.Prefix+":{g:", "}:resume"
	var keys []string
	err := s.scan(ctx, globEscape(start)+"*"+end, func(k string) bool {
		keys = append(keys, k)
		return true
	})
	if err != nil {
		return nil, redisFailure(op, err)
	}
	slices.Sort(keys)
	out := make([]ResumeOffset, 0, len(keys))
	for _, k := range keys {
		f, ok := strings.CutPrefix(k, start)
		if f, ok = strings.CutSuffix(f, end); !ok {
			continue
		}
		tp, err := parsePartitionField(f)
		if err != nil {
			return nil, permanent(op, fmt.Errorf("key %q: %w", k, err))
		}
		v, err := s.rdb.Get(ctx, k).Int64()
		if errors.Is(err, redis.Nil) {
			continue // deleted since the scan
		}
		if err != nil {
			return nil, redisFailure(op, fmt.Errorf("key %q: %w", k, err))
		}
		out = append(out, ResumeOffset{Topic: tp.Topic, Partition: tp.Partition, Offset: v})
	}
	slices.SortFunc(out, func(a, b ResumeOffset) int {
		return cmp.Or(cmp.Compare(a.Topic, b.Topic), cmp.Compare(a.Partition, b.Partition))
	})
	return out, nil
}

// isBufferKey reports whether the key (prefix removed) is a join buffer:
// a key of the click index ({i...}: entries, filters, orphans, the
// descriptor and dictionary), of its first layout ({k:...}), a due set
// ({o:...}) or a conversion marker ({x:<exp>}:cv:...).
func isBufferKey(rest string) bool {
	switch {
	case strings.HasPrefix(rest, ":{i"), strings.HasPrefix(rest, ":{k:"), strings.HasPrefix(rest, ":{o:"):
		return true
	case strings.HasPrefix(rest, ":{x:"):
		i := strings.IndexByte(rest, '}')
		return i > 0 && strings.HasPrefix(rest[i+1:], ":cv:")
	}
	return false
}

// exportBuffers dumps every join buffer key with its remaining TTL.
func (s *Store) exportBuffers(ctx context.Context) ([]BufferKey, error) {
	var keys []string
	err := s.scan(ctx, globEscape(s.opts.Prefix)+":{*", func(k string) bool {
		if isBufferKey(k[len(s.opts.Prefix):]) {
			keys = append(keys, k)
		}
		return true
	})
	if err != nil {
		return nil, err
	}
	slices.Sort(keys)
	var out []BufferKey
	const batch = 256
	for len(keys) > 0 {
		n := min(batch, len(keys))
		part := keys[:n]
		keys = keys[n:]
		pipe := s.rdb.Pipeline()
		dumps := make([]*redis.StringCmd, n)
		ttls := make([]*redis.DurationCmd, n)
		for i, k := range part {
			dumps[i] = pipe.Dump(ctx, k)
			ttls[i] = pipe.PTTL(ctx, k)
		}
		if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
			return nil, err
		}
		for i, k := range part {
			d, err := dumps[i].Result()
			if errors.Is(err, redis.Nil) {
				continue // expired since the scan
			}
			if err != nil {
				return nil, fmt.Errorf("dump %q: %w", k, err)
			}
			ttl := ttls[i].Val()
			if ttl == -2 { // gone between DUMP and PTTL (go-redis keeps -2 and -1 raw)
				continue
			}
			ms := ttl.Milliseconds()
			if ttl < 0 {
				ms = 0 // no expiry
			} else if ms == 0 {
				ms = 1
			}
			out = append(out, BufferKey{Key: k[len(s.opts.Prefix):], TTLMs: ms, Dump: []byte(d)})
		}
	}
	return out, nil
}

func msDuration(ms int64) time.Duration { return time.Duration(ms) * time.Millisecond }

// scan calls fn for every key matching pattern (on every master of a
// cluster) until fn returns false. Keys may repeat (SCAN's guarantee).
func (s *Store) scan(ctx context.Context, pattern string, fn func(string) bool) error {
	var mu sync.Mutex
	stop := false
	one := func(ctx context.Context, c redis.Cmdable) error {
		var cursor uint64
		for {
			keys, next, err := c.Scan(ctx, cursor, pattern, 1000).Result()
			if err != nil {
				return fmt.Errorf("scan %q: %w", pattern, err)
			}
			mu.Lock()
			for _, k := range keys {
				if !stop && !fn(k) {
					stop = true
				}
			}
			done := stop
			mu.Unlock()
			if done || next == 0 {
				return nil
			}
			cursor = next
		}
	}
	switch c := s.rdb.(type) {
	case *redis.ClusterClient:
		return c.ForEachMaster(ctx, func(ctx context.Context, m *redis.Client) error { return one(ctx, m) })
	case *redis.Ring:
		return c.ForEachShard(ctx, func(ctx context.Context, m *redis.Client) error { return one(ctx, m) })
	default:
		return one(ctx, s.rdb)
	}
}

// globEscape quotes the glob metacharacters of SCAN MATCH.
func globEscape(s string) string {
	var b strings.Builder
	for _, r := range s {
		if strings.ContainsRune(`*?[]\`, r) {
			b.WriteByte('\\')
		}
		b.WriteRune(r)
	}
	return b.String()
}

// WriteSnapshot writes snap to w as indented JSON (HTML characters in
// allocations are kept as they are).
func WriteSnapshot(w io.Writer, snap *Snapshot) error {
	enc := json.NewEncoder(w)
	enc.SetEscapeHTML(false)
	enc.SetIndent("", "  ")
	if err := enc.Encode(snap); err != nil {
		return fmt.Errorf("write snapshot: %w", err)
	}
	return nil
}

// ReadSnapshot reads a snapshot written by WriteSnapshot, strictly:
// unknown fields and trailing data are errors.
func ReadSnapshot(r io.Reader) (*Snapshot, error) {
	dec := json.NewDecoder(r)
	dec.DisallowUnknownFields()
	var snap Snapshot
	if err := dec.Decode(&snap); err != nil {
		return nil, fmt.Errorf("read snapshot: %w", err)
	}
	if _, err := dec.Token(); err != io.EOF {
		return nil, errors.New("read snapshot: data after the snapshot")
	}
	return &snap, nil
}

// digestVersion starts the digest input, so that a change of the encoding
// changes every digest.
const digestVersion = "ripen-state-digest-v1"

// Digest returns the hex SHA-256 of a canonical encoding of snap's logical
// state: experiments, arms and partitions sorted; every arm re-keyed to
// canonical buckets at its watermark (so field order in Redis, compaction
// and the bucket levels deltas were written at do not matter); allocations
// as canonical JSON (object keys sorted, no blanks). Snapshots of the same
// state under different prefixes have the same digest. The prefix, the
// format number and the join buffers are not covered. An experiment that
// fails Validate is hashed in its JSON form, so its digest differs from
// any valid one.
func Digest(snap *Snapshot) string {
	h := sha256.New()
	w := digestWriter{w: h}
	w.str(digestVersion)
	if snap == nil {
		return hex.EncodeToString(h.Sum(nil))
	}
	exps := make([]*ExperimentSnapshot, len(snap.Experiments))
	for i := range snap.Experiments {
		exps[i] = &snap.Experiments[i]
	}
	slices.SortStableFunc(exps, func(a, b *ExperimentSnapshot) int { return cmp.Compare(a.ID, b.ID) })
	w.u64(uint64(len(exps)))
	for _, e := range exps {
		ce, err := e.canonical()
		if err != nil {
			b, _ := json.Marshal(e)
			w.str("invalid")
			w.str(string(b))
			continue
		}
		w.experiment(ce)
	}
	res := slices.Clone(snap.Resume)
	slices.SortFunc(res, func(a, b ResumeOffset) int {
		return cmp.Or(cmp.Compare(a.Topic, b.Topic), cmp.Compare(a.Partition, b.Partition))
	})
	w.u64(uint64(len(res)))
	for _, r := range res {
		w.str(r.Topic)
		w.i64(int64(r.Partition))
		w.i64(r.Offset)
	}
	return hex.EncodeToString(h.Sum(nil))
}

// digestWriter writes length-prefixed values, so that no two different
// sequences encode alike.
type digestWriter struct {
	w   io.Writer
	buf [binary.MaxVarintLen64]byte
}

func (d *digestWriter) u64(v uint64) {
	n := binary.PutUvarint(d.buf[:], v)
	_, _ = d.w.Write(d.buf[:n])
}

func (d *digestWriter) i64(v int64) {
	n := binary.PutVarint(d.buf[:], v)
	_, _ = d.w.Write(d.buf[:n])
}

func (d *digestWriter) str(s string) {
	d.u64(uint64(len(s)))
	_, _ = io.WriteString(d.w, s)
}

func (d *digestWriter) experiment(ce canonExperiment) {
	e := ce.e
	d.str("experiment")
	d.str(e.ID)
	if e.Layout == nil {
		d.str("")
	} else {
		d.str(encodeLayout(ce.layout))
		d.i64(e.Watermark)
	}
	d.i64(e.AllocationSeq)
	d.str(canonicalJSON(e.Allocation))
	offs := slices.Clone(e.Offsets)
	slices.SortFunc(offs, func(a, b PartitionOffset) int {
		return cmp.Or(cmp.Compare(a.Topic, b.Topic), cmp.Compare(a.Partition, b.Partition))
	})
	d.u64(uint64(len(offs)))
	for _, o := range offs {
		d.str(o.Topic)
		d.i64(int64(o.Partition))
		d.i64(int64(o.Generation))
		d.i64(o.Offset)
	}
	names := make([]string, 0, len(ce.arms))
	for n := range ce.arms {
		names = append(names, n)
	}
	slices.Sort(names)
	d.u64(uint64(len(names)))
	for _, n := range names {
		c := ce.arms[n]
		d.str(n)
		d.buckets(c.clicks)
		d.buckets(c.converted)
		d.u64(c.maturedClicks)
		d.u64(c.maturedConversions)
		d.u64(uint64(len(c.delays)))
		for _, v := range c.delays {
			d.u64(v)
		}
		d.u64(c.delayCount)
		d.u64(c.delaySumMs)
	}
}

func (d *digestWriter) buckets(m map[estimator.BucketKey]uint64) {
	keys := sortedBucketKeys(m)
	keys = slices.DeleteFunc(keys, func(k estimator.BucketKey) bool { return m[k] == 0 })
	d.u64(uint64(len(keys)))
	for _, k := range keys {
		d.u64(uint64(k.Level))
		d.i64(k.Index)
		d.u64(m[k])
	}
}

func sortedBucketKeys(m map[estimator.BucketKey]uint64) []estimator.BucketKey {
	keys := make([]estimator.BucketKey, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	slices.SortFunc(keys, func(a, b estimator.BucketKey) int {
		return cmp.Or(cmp.Compare(a.Level, b.Level), cmp.Compare(a.Index, b.Index))
	})
	return keys
}

// canonicalJSON re-encodes a JSON value with object keys sorted, no
// blanks, numbers as written and no HTML escaping; "" for none.
func canonicalJSON(raw json.RawMessage) string {
	if len(raw) == 0 {
		return ""
	}
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	var v any
	if err := dec.Decode(&v); err != nil {
		return "invalid:" + string(raw)
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetEscapeHTML(false)
	if err := enc.Encode(v); err != nil {
		return "invalid:" + string(raw)
	}
	return strings.TrimSuffix(buf.String(), "\n")
}

// DiffKind says how an entry of Diff differs.
type DiffKind string

// Kinds of ArmDiff.
const (
	// DiffOnlyInA: the arm (or experiment) is in a but not in b.
	DiffOnlyInA DiffKind = "only_in_a"
	// DiffOnlyInB: the arm (or experiment) is in b but not in a.
	DiffOnlyInB DiffKind = "only_in_b"
	// DiffChanged: both have it; Fields name what differs.
	DiffChanged DiffKind = "changed"
)

// ArmDiff is one difference between two snapshots. Arm is "" for the
// experiment's own settings (layout, watermark, offsets, allocation) or for
// an experiment missing on one side; Experiment and Arm are both "" for
// resume offsets.
type ArmDiff struct {
	Experiment string   `json:"experiment"`
	Arm        string   `json:"arm,omitempty"`
	Kind       DiffKind `json:"kind"`
	// Fields name what differs, for DiffChanged: pending_clicks,
	// pending_conversions, matured_clicks, matured_conversions, delays,
	// delay_count, delay_sum_ms for an arm; layout, watermark,
	// offset:<topic>/<partition>, allocation_seq, allocation for an
	// experiment; resume:<topic>/<partition>; invalid:<reason> when one
	// side fails validation.
	Fields []string `json:"fields,omitempty"`
	// A and B are the arm's totals on each side (zero when missing).
	A ArmTotals `json:"a"`
	B ArmTotals `json:"b"`
}

// ArmTotals sums an arm's counts for a Diff entry.
type ArmTotals struct {
	// Clicks and Conversions are pending plus matured; Conversions
	// include held-back ones.
	Clicks      uint64 `json:"clicks"`
	Conversions uint64 `json:"conversions"`
}

func (c armCounts) totals() ArmTotals {
	t := ArmTotals{Clicks: c.maturedClicks, Conversions: c.maturedConversions}
	for _, n := range c.clicks {
		t.Clicks += n
	}
	for _, n := range c.converted {
		t.Conversions += n
	}
	return t
}

// Diff lists what differs between a and b on the canonical forms Digest
// covers, sorted by experiment and arm: it is empty exactly when the two
// digests are equal (join buffers aside).
func Diff(a, b *Snapshot) []ArmDiff {
	if a == nil {
		a = &Snapshot{}
	}
	if b == nil {
		b = &Snapshot{}
	}
	byID := func(s *Snapshot) map[string]*ExperimentSnapshot {
		m := make(map[string]*ExperimentSnapshot, len(s.Experiments))
		for i := range s.Experiments {
			m[s.Experiments[i].ID] = &s.Experiments[i]
		}
		return m
	}
	ea, eb := byID(a), byID(b)
	ids := make([]string, 0, len(ea)+len(eb))
	for id := range ea {
		ids = append(ids, id)
	}
	for id := range eb {
		if _, ok := ea[id]; !ok {
			ids = append(ids, id)
		}
	}
	slices.Sort(ids)
	var out []ArmDiff
	for _, id := range ids {
		out = append(out, diffExperiment(id, ea[id], eb[id])...)
	}
	ra, rb := map[TopicPartition]int64{}, map[TopicPartition]int64{}
	for _, r := range a.Resume {
		ra[TopicPartition{r.Topic, r.Partition}] = r.Offset
	}
	for _, r := range b.Resume {
		rb[TopicPartition{r.Topic, r.Partition}] = r.Offset
	}
	if f := diffPartitions("resume:", ra, rb); len(f) > 0 {
		out = append(out, ArmDiff{Kind: DiffChanged, Fields: f})
	}
	return out
}

// diffPartitions names the partitions whose values differ or that one side
// lacks.
func diffPartitions[V comparable](label string, a, b map[TopicPartition]V) []string {
	var tps []TopicPartition
	for tp, v := range a {
		if w, ok := b[tp]; !ok || w != v {
			tps = append(tps, tp)
		}
	}
	for tp := range b {
		if _, ok := a[tp]; !ok {
			tps = append(tps, tp)
		}
	}
	slices.SortFunc(tps, func(x, y TopicPartition) int {
		return cmp.Or(cmp.Compare(x.Topic, y.Topic), cmp.Compare(x.Partition, y.Partition))
	})
	out := make([]string, len(tps))
	for i, tp := range tps {
		out[i] = label + tp.String()
	}
	return out
}

func diffExperiment(id string, a, b *ExperimentSnapshot) []ArmDiff {
	canon := func(e *ExperimentSnapshot) (canonExperiment, error) {
		if e == nil {
			return canonExperiment{}, nil
		}
		return e.canonical()
	}
	ca, errA := canon(a)
	cb, errB := canon(b)
	armsOf := func(c canonExperiment) map[string]armCounts { return c.arms }
	switch {
	case a == nil || b == nil:
		kind, c := DiffOnlyInA, ca
		if a == nil {
			kind, c = DiffOnlyInB, cb
		}
		out := []ArmDiff{{Experiment: id, Kind: kind}}
		for _, n := range sortedArmNames(armsOf(c), nil) {
			d := ArmDiff{Experiment: id, Arm: n, Kind: kind}
			if kind == DiffOnlyInA {
				d.A = c.arms[n].totals()
			} else {
				d.B = c.arms[n].totals()
			}
			out = append(out, d)
		}
		return out
	case errA != nil || errB != nil:
		var f []string
		for _, err := range []error{errA, errB} {
			if err != nil {
				f = append(f, "invalid:"+err.Error())
			}
		}
		return []ArmDiff{{Experiment: id, Kind: DiffChanged, Fields: f}}
	}
	var out []ArmDiff
	var f []string
	if (a.Layout == nil) != (b.Layout == nil) || (a.Layout != nil && ca.layout != cb.layout) {
		f = append(f, "layout")
	}
	if a.Watermark != b.Watermark {
		f = append(f, "watermark")
	}
	oa, ob := map[TopicPartition]AppliedOffset{}, map[TopicPartition]AppliedOffset{}
	for _, o := range a.Offsets {
		oa[TopicPartition{o.Topic, o.Partition}] = AppliedOffset{o.Generation, o.Offset}
	}
	for _, o := range b.Offsets {
		ob[TopicPartition{o.Topic, o.Partition}] = AppliedOffset{o.Generation, o.Offset}
	}
	f = append(f, diffPartitions("offset:", oa, ob)...)
	if a.AllocationSeq != b.AllocationSeq {
		f = append(f, "allocation_seq")
	}
	if canonicalJSON(a.Allocation) != canonicalJSON(b.Allocation) {
		f = append(f, "allocation")
	}
	if len(f) > 0 {
		out = append(out, ArmDiff{Experiment: id, Kind: DiffChanged, Fields: f})
	}
	for _, n := range sortedArmNames(ca.arms, cb.arms) {
		x, inA := ca.arms[n]
		y, inB := cb.arms[n]
		d := ArmDiff{Experiment: id, Arm: n}
		switch {
		case !inB:
			d.Kind, d.A = DiffOnlyInA, x.totals()
		case !inA:
			d.Kind, d.B = DiffOnlyInB, y.totals()
		default:
			d.Fields = diffArm(x, y)
			if len(d.Fields) == 0 {
				continue
			}
			d.Kind, d.A, d.B = DiffChanged, x.totals(), y.totals()
		}
		out = append(out, d)
	}
	return out
}

// diffArm names the counts that differ between two canonical arms.
func diffArm(x, y armCounts) []string {
	var f []string
	if !bucketsEqual(x.clicks, y.clicks) {
		f = append(f, "pending_clicks")
	}
	if !bucketsEqual(x.converted, y.converted) {
		f = append(f, "pending_conversions")
	}
	if x.maturedClicks != y.maturedClicks {
		f = append(f, "matured_clicks")
	}
	if x.maturedConversions != y.maturedConversions {
		f = append(f, "matured_conversions")
	}
	if !slices.Equal(x.delays, y.delays) {
		f = append(f, "delays")
	}
	if x.delayCount != y.delayCount {
		f = append(f, "delay_count")
	}
	if x.delaySumMs != y.delaySumMs {
		f = append(f, "delay_sum_ms")
	}
	return f
}

func bucketsEqual(a, b map[estimator.BucketKey]uint64) bool {
	for k, n := range a {
		if n != b[k] {
			return false
		}
	}
	for k, n := range b {
		if n != a[k] {
			return false
		}
	}
	return true
}

func sortedArmNames(a, b map[string]armCounts) []string {
	var names []string
	for n := range a {
		names = append(names, n)
	}
	for n := range b {
		if _, ok := a[n]; !ok {
			names = append(names, n)
		}
	}
	slices.Sort(names)
	return names
}
