package state

import (
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"
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
	// Window is the experiment's attribution window; the index keeps the
	// entry until the watermark passes the click time plus the index
	// horizon, which Window raises when it is longer.
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
	// ClickExpired: the click's generation of the index was deleted
	// already (its time is more than the horizon behind the watermark);
	// nothing was stored, and no conversion can join it any more.
	ClickExpired
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
	case ClickExpired:
		return "expired"
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

// maxVerbatimID is the longest click id stored as its own index field;
// longer ones are stored as the first hashedIDBytes bytes of their
// SHA-256, a field no verbatim id can equal. With the group and sub-key a
// stored id is about 90 bits of the hash: two of 10^9 pending ids share a
// field with a probability near 10^-9 (the birthday bound n^2/2^89).
const (
	maxVerbatimID = 9
	hashedIDBytes = 10
)

// clickRef is where a click id lives in the index.
type clickRef struct {
	field string
	group int
	hash  uint64 // FNV-1a (64-bit) of the id
}

func refOf(id string) clickRef {
	// FNV-1a, 64-bit (as hash/fnv's New64a computes it, without its
	// allocation).
	x := uint64(14695981039346656037)
	for i := 0; i < len(id); i++ {
		x ^= uint64(id[i])
		x *= 1099511628211
	}
	f := id
	if len(id) > maxVerbatimID {
		sum := sha256.Sum256([]byte(id))
		f = string(sum[:hashedIDBytes])
	}
	return clickRef{field: f, group: int(x % indexGroups), hash: x}
}

// sub is the click's sub-key in a generation of m sub-keys per group.
func (r clickRef) sub(m int) int { return int((r.hash >> 8) & uint64(m-1)) }

// bit is the click's bit in the filter of a generation of m sub-keys.
func (r clickRef) bit(m int) int64 {
	return int64((r.hash >> 32) & uint64(m*indexFilterBitsPerSub-1))
}

// entry is a click's index entry: its experiment and arm (dictionary id),
// its time relative to its generation's start, and its origin (topic
// dictionary id, 0 when unknown, partition and offset).
type entry struct {
	arm       uint64
	tsOff     int64
	topic     uint64
	partition int
	offset    int64
}

// encode writes the entry as unsigned varints: arm id, time offset, topic
// id, and, when the topic id is not 0, partition and offset.
func (e entry) encode() []byte { return e.appendTo(make([]byte, 0, 16)) }

// appendTo appends the entry's encoding (see encode) to b.
func (e entry) appendTo(b []byte) []byte {
	b = binary.AppendUvarint(b, e.arm)
	b = binary.AppendUvarint(b, uint64(e.tsOff))
	b = binary.AppendUvarint(b, e.topic)
	if e.topic != 0 {
		b = binary.AppendUvarint(b, uint64(e.partition))
		b = binary.AppendUvarint(b, uint64(e.offset))
	}
	return b
}

func decodeEntry(b []byte) (entry, error) {
	var vals [5]uint64
	n := 3
	for i := 0; i < n; i++ {
		v, k := binary.Uvarint(b)
		if k <= 0 {
			return entry{}, fmt.Errorf("%w: click index entry %x", ErrCorrupt, b)
		}
		vals[i] = v
		b = b[k:]
		if i == 2 && v != 0 {
			n = 5
		}
	}
	if len(b) != 0 || vals[1] > maxExact || vals[3] > math.MaxInt32 || vals[4] > maxExact {
		return entry{}, fmt.Errorf("%w: click index entry of %d trailing bytes", ErrCorrupt, len(b))
	}
	return entry{arm: vals[0], tsOff: int64(vals[1]), topic: vals[2], partition: int(vals[3]), offset: int64(vals[4])}, nil
}

// splitOrigin parses "<topic>/<partition>/<offset>".
func splitOrigin(org string) (string, int, int64, bool) {
	j := strings.LastIndexByte(org, '/')
	if j < 0 {
		return "", 0, 0, false
	}
	i := strings.LastIndexByte(org[:j], '/')
	if i <= 0 {
		return "", 0, 0, false
	}
	p, err1 := strconv.Atoi(org[i+1 : j])
	off, err2 := strconv.ParseInt(org[j+1:], 10, 64)
	if err1 != nil || err2 != nil || p < 0 || off < 0 || off >= maxExact {
		return "", 0, 0, false
	}
	return org[:i], p, off, true
}

// entryDecoder turns stored entries back into ClickEntry values, reading
// the dictionary names they use once per call.
type entryDecoder struct {
	raw []rawEntry
}

type rawEntry struct {
	e   entry
	gen int64
	out *ClickEntry
}

func (d *entryDecoder) add(b []byte, gen int64, out *ClickEntry) error {
	e, err := decodeEntry(b)
	if err != nil {
		return err
	}
	d.raw = append(d.raw, rawEntry{e, gen, out})
	return nil
}

func (d *entryDecoder) run(ctx context.Context, s *Store, genMs int64) error {
	if len(d.raw) == 0 {
		return nil
	}
	ids := make([]uint64, 0, 2*len(d.raw))
	for _, r := range d.raw {
		ids = append(ids, r.e.arm)
		if r.e.topic != 0 {
			ids = append(ids, r.e.topic)
		}
	}
	names, err := s.dictNames(ctx, ids)
	if err != nil {
		return err
	}
	for _, r := range d.raw {
		a, ok := strings.CutPrefix(names[r.e.arm], "a:")
		exp, arm, ok2 := strings.Cut(a, "\n")
		if !ok || !ok2 {
			return fmt.Errorf("%w: arm id %d names %q", ErrCorrupt, r.e.arm, names[r.e.arm])
		}
		*r.out = ClickEntry{Experiment: exp, Arm: arm, TS: r.gen*genMs + r.e.tsOff}
		if r.e.topic != 0 {
			topic, ok := strings.CutPrefix(names[r.e.topic], "t:")
			if !ok {
				return fmt.Errorf("%w: topic id %d names %q", ErrCorrupt, r.e.topic, names[r.e.topic])
			}
			r.out.Origin = topic + "/" + strconv.Itoa(r.e.partition) + "/" + strconv.FormatInt(r.e.offset, 10)
		}
	}
	d.raw = d.raw[:0]
	return nil
}

// IndexClicks indexes clicks in order. A click id is indexed once among
// the index's live generations: a later click with the id from another
// origin is reported as ClickDuplicate and changes nothing, the same click
// read again is ClickRedelivered. The conversion parked waiting for an
// indexed click is claimed and returned with it.
//
// A click is written to the sub-key of its generation with HSETNX, which
// settles duplicates within the generation atomically. Other live
// generations are checked first: each generation of each group has a
// filter bitmap with one bit per click id (BITFIELD, one command per
// group and generation), and only the ids whose bit is set there are
// read (HGET); a click found in another generation is a duplicate. That
// check and the write are two steps, so two clicks with one id and click
// times in different generations, read from different partitions and
// indexed at the same moment by two instances, may both count; keep the
// click topic keyed by click id and such copies share a partition and
// one instance, which indexes them in order.
//
// After the writes, the group's parked orphans are read (HMGET, one
// command per group) and the ones found are claimed with claim.lua. No
// join is lost when an instance parks the click's conversion at the same
// moment: lookup.lua checks for the click and parks atomically in the
// group's slot, and this connection writes the click before it reads the
// orphans, so either the lookup ran before the write (then the orphan
// is read here and claimed) or after it (then the lookup found the click
// and parked nothing). Nor is one joined twice: a conversion found by its
// lookup is never parked, and a claimed orphan is marked so (the
// experiment's conversion marker dedupes a claim repeated by a redelivered
// click).
func (s *Store) IndexClicks(ctx context.Context, clicks []ClickRecord) ([]ClickResult, error) {
	const op = "put clicks"
	if len(clicks) == 0 {
		return nil, nil
	}
	var horizon time.Duration
	gens := make([]int64, 0, 4)
	for _, c := range clicks {
		if err := validClick(c); err != nil {
			return nil, permanent(op, err)
		}
		horizon = max(horizon, c.Window)
	}
	v, err := s.refreshIndex(ctx, horizon, nil)
	if err != nil {
		return nil, err
	}
	out := make([]ClickResult, len(clicks))
	w := &clickWrite{s: s, v: v, clicks: clicks, out: out, first: make(map[string]int, len(clicks))}
	for i, c := range clicks {
		g := v.gen(c.TS)
		if j, ok := w.first[c.ClickID]; ok {
			w.later = append(w.later, [2]int{i, j})
			continue
		}
		w.first[c.ClickID] = i
		if g <= v.retired {
			// Not indexed, but it still takes a conversion parked for it.
			out[i].Status = ClickExpired
			w.todo = append(w.todo, pendingClick{i: i, ref: refOf(c.ClickID), gen: g, settled: true, expired: true})
			continue
		}
		w.todo = append(w.todo, pendingClick{i: i, ref: refOf(c.ClickID), gen: g})
		if !containsInt64(gens, g) {
			gens = append(gens, g)
		}
	}
	if err := w.prepare(ctx, gens); err != nil {
		return nil, err
	}
	if err := w.screen(ctx); err != nil {
		return nil, err
	}
	if err := w.write(ctx); err != nil {
		return nil, err
	}
	if err := w.claim(ctx); err != nil {
		return nil, err
	}
	if err := w.dec.run(ctx, s, v.genMs); err != nil {
		return nil, permanent(op, err)
	}
	// Later copies of an id in the batch: the same click again is a
	// redelivery of the first (which claimed its orphan, so this one sees
	// it claimed); another one is a duplicate of whatever holds the id.
	for _, lj := range w.later {
		i, j := lj[0], lj[1]
		first := out[j]
		switch {
		case first.Status == ClickExpired:
			out[i].Status = ClickExpired
		case first.Status != ClickDuplicate && sameClick(clicks[i], clicks[j]):
			out[i].Status = ClickRedelivered
			if o := first.Orphan; o != nil {
				again := *o
				again.Claimed = true
				out[i].Orphan = &again
			}
		case first.Status == ClickDuplicate:
			out[i] = ClickResult{Status: ClickDuplicate, Existing: first.Existing}
		default:
			c := clicks[j]
			out[i] = ClickResult{Status: ClickDuplicate, Existing: ClickEntry{Experiment: c.Experiment, Arm: c.Arm, TS: c.TS, Origin: c.Origin}}
		}
	}
	return out, nil
}

// validClick checks a click record.
func validClick(c ClickRecord) error {
	if c.ClickID == "" || c.Arm == "" || c.Window <= 0 {
		return fmt.Errorf("%w: click %q on arm %q with window %v", ErrInvalid, c.ClickID, c.Arm, c.Window)
	}
	if err := validExperiment(c.Experiment); err != nil {
		return fmt.Errorf("click %q: %w", c.ClickID, err)
	}
	if strings.ContainsRune(c.Experiment, '\n') || strings.ContainsRune(c.Arm, '\n') {
		return fmt.Errorf("%w: click %q: experiment or arm holds a newline", ErrInvalid, c.ClickID)
	}
	if c.TS <= -maxExact || c.TS >= maxExact {
		return fmt.Errorf("%w: click %q: time %d out of range", ErrInvalid, c.ClickID, c.TS)
	}
	if c.Origin != "" {
		topic, _, _, ok := splitOrigin(c.Origin)
		if !ok {
			return fmt.Errorf("%w: click %q: origin %q, want <topic>/<partition>/<offset>", ErrInvalid, c.ClickID, c.Origin)
		}
		if err := validPartition(topic, 0); err != nil {
			return fmt.Errorf("click %q: %w", c.ClickID, err)
		}
	}
	return nil
}

// sameClick reports whether two records are the same click read twice.
func sameClick(a, b ClickRecord) bool {
	return a.Origin == b.Origin && a.Experiment == b.Experiment && a.Arm == b.Arm && a.TS == b.TS
}

// pendingClick is a click of a batch being indexed (the first of its id
// in the batch).
type pendingClick struct {
	i     int // index in the batch
	ref   clickRef
	gen   int64
	value string // encoded entry
	// settled is set when the click's status is known before the write:
	// a duplicate of an entry in another generation, or a click the
	// first layout holds (see legacyindex.go); nothing is written for it.
	settled bool
	// expired is set for a click of a retired generation (ClickExpired).
	expired bool
	// setnx is the write; hasOrphan says the group's orphans hash had the
	// click's field after it.
	setnx     *redis.BoolCmd
	hasOrphan bool
	// legacy reads of the first layout (see legacyindex.go).
	legacyGet    *redis.StringCmd
	legacyOrphan *redis.IntCmd
}

// clickWrite is one IndexClicks call in progress.
type clickWrite struct {
	s      *Store
	v      indexView
	clicks []ClickRecord
	out    []ClickResult
	first  map[string]int // click id -> index of its first record
	later  [][2]int       // (index, index of the first record of its id)
	todo   []pendingClick
	dec    entryDecoder
}

// prepare sizes new generations, raises the horizon, and encodes the
// entries (assigning dictionary ids).
func (w *clickWrite) prepare(ctx context.Context, gens []int64) error {
	s, v := w.s, &w.v
	if len(w.todo) == 0 {
		return nil
	}
	// Clicks expected in a generation without history: the batch's clicks
	// of it scaled to the whole generation, the batch taken to span at
	// least 1/64 of it.
	est := map[int64]float64{}
	lo, hi, cnt := map[int64]int64{}, map[int64]int64{}, map[int64]int{}
	for _, p := range w.todo {
		if p.expired {
			continue
		}
		ts := w.clicks[p.i].TS
		if cnt[p.gen] == 0 {
			lo[p.gen], hi[p.gen] = ts, ts
		}
		lo[p.gen], hi[p.gen] = min(lo[p.gen], ts), max(hi[p.gen], ts)
		cnt[p.gen]++
	}
	for g, n := range cnt {
		span := max(hi[g]-lo[g]+1, v.genMs/64)
		est[g] = float64(n) * float64(v.genMs) / float64(span)
	}
	if err := s.sizeGenerations(ctx, v, gens, est); err != nil {
		return err
	}
	// Dictionary names, each built once per distinct experiment and arm,
	// or topic.
	type armKey struct{ exp, arm string }
	armNames := map[armKey]string{}
	topicNames := map[string]string{}
	var names []string
	type origin struct {
		topic     string
		partition int
		offset    int64
	}
	origins := make([]origin, len(w.todo))
	for k, p := range w.todo {
		if p.expired {
			continue
		}
		c := w.clicks[p.i]
		if ak := (armKey{c.Experiment, c.Arm}); armNames[ak] == "" {
			armNames[ak] = armName(c.Experiment, c.Arm)
			names = append(names, armNames[ak])
		}
		if c.Origin != "" {
			topic, part, off, _ := splitOrigin(c.Origin)
			origins[k] = origin{topic, part, off}
			if topicNames[topic] == "" {
				topicNames[topic] = topicName(topic)
				names = append(names, topicNames[topic])
			}
		}
	}
	ids, err := s.dictIDs(ctx, names)
	if err != nil {
		return err
	}
	buf := make([]byte, 0, 16*len(w.todo))
	for k := range w.todo {
		p := &w.todo[k]
		if p.expired {
			continue
		}
		c := w.clicks[p.i]
		e := entry{arm: ids[armNames[armKey{c.Experiment, c.Arm}]], tsOff: c.TS - p.gen*v.genMs}
		if o := origins[k]; o.topic != "" {
			e.topic, e.partition, e.offset = ids[topicNames[o.topic]], o.partition, o.offset
		}
		start := len(buf)
		buf = e.appendTo(buf)
		p.value = string(buf[start:])
	}
	return nil
}

// screen looks for each click's id in the other live generations: their
// filters first, then the entries of the ids whose bit is set; and, up to
// the legacy bound, in the first layout. A click found is a duplicate of
// what holds the id.
func (w *clickWrite) screen(ctx context.Context) error {
	const op = "put clicks"
	s, v := w.s, w.v
	type probe struct {
		k   int // index into todo
		gen int64
	}
	type filterCmd struct {
		key     string
		probes  []probe
		offsets []int64
	}
	filters := map[groupGen]*filterCmd{}
	var order []groupGen
	legacy := false
	for k, p := range w.todo {
		if p.settled {
			continue
		}
		for g, m := range v.subs {
			if g == p.gen {
				continue
			}
			gg := groupGen{p.ref.group, g}
			f := filters[gg]
			if f == nil {
				f = &filterCmd{key: s.keys.indexFilter(gg.group, g)}
				filters[gg] = f
				order = append(order, gg)
			}
			f.probes = append(f.probes, probe{k, g})
			f.offsets = append(f.offsets, p.ref.bit(m))
		}
		if v.legacy != NoTime && w.clicks[p.i].TS <= v.legacy {
			legacy = true
		}
	}
	if len(order) == 0 && !legacy {
		return nil
	}
	pipe := s.rdb.Pipeline()
	reads := make([]func() ([]int64, error), len(order))
	for i, gg := range order {
		f := filters[gg]
		reads[i] = w.v.bits.get(ctx, pipe, f.key, f.offsets)
	}
	w.legacyGets(ctx, pipe)
	if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
		return redisFailure(op, fmt.Errorf("%d clicks: filters: %w", len(w.todo), err))
	}
	var hits []probe
	for i, gg := range order {
		bitsSet, err := reads[i]()
		if err != nil || len(bitsSet) != len(filters[gg].probes) {
			return redisFailure(op, fmt.Errorf("filter %s: %v", filters[gg].key, err))
		}
		for j, b := range bitsSet {
			if b != 0 {
				hits = append(hits, filters[gg].probes[j])
			}
		}
	}
	if err := w.legacyDuplicates(); err != nil {
		return permanent(op, err)
	}
	if len(hits) == 0 {
		return nil
	}
	// Older generations first, so that Existing names the earliest copy.
	slices.SortFunc(hits, func(a, b probe) int { return cmp.Or(cmp.Compare(a.k, b.k), cmp.Compare(a.gen, b.gen)) })
	pipe = s.rdb.Pipeline()
	gets := make([]*redis.StringCmd, len(hits))
	for i, h := range hits {
		p := w.todo[h.k]
		gets[i] = pipe.HGet(ctx, s.keys.indexEntries(p.ref.group, h.gen, p.ref.sub(v.subs[h.gen])), p.ref.field)
	}
	if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
		return redisFailure(op, fmt.Errorf("%d clicks: entries: %w", len(w.todo), err))
	}
	for i, h := range hits {
		b, err := gets[i].Bytes()
		if errors.Is(err, redis.Nil) {
			continue // the filter's false positive
		}
		if err != nil {
			return redisFailure(op, err)
		}
		p := &w.todo[h.k]
		if p.settled {
			continue
		}
		p.settled = true
		w.out[p.i].Status = ClickDuplicate
		if err := w.dec.add(b, h.gen, &w.out[p.i].Existing); err != nil {
			return permanent(op, err)
		}
	}
	return nil
}

// write stores the clicks not found elsewhere and reads their groups'
// parked orphans after them; see IndexClicks.
func (w *clickWrite) write(ctx context.Context) error {
	const op = "put clicks"
	s, v := w.s, w.v
	pipe := s.rdb.Pipeline()
	setBits := map[groupGen][]int64{}
	var order []groupGen
	counts := map[int64]int64{}
	orphanFields := map[int][]int{} // group -> indices into todo
	var groups []int
	ix := &s.ix
	ix.mu.Lock()
	var copies []groupGen
	for _, p := range w.todo {
		gg := groupGen{p.ref.group, p.gen}
		if !p.settled && !ix.copied[gg] && !slices.Contains(copies, gg) {
			copies = append(copies, gg)
		}
	}
	ix.mu.Unlock()
	// The group's copy of a generation's size goes first, so that a lookup
	// in the group's slot knows every sub-key a click may be written to.
	for _, gg := range copies {
		pipe.HSetNX(ctx, s.keys.indexGens(gg.group), strconv.FormatInt(gg.gen, 10), v.subs[gg.gen])
	}
	for k := range w.todo {
		p := &w.todo[k]
		if p.expired {
			if orphanFields[p.ref.group] == nil {
				groups = append(groups, p.ref.group)
			}
			orphanFields[p.ref.group] = append(orphanFields[p.ref.group], k)
		}
		if p.settled {
			continue
		}
		m := v.subs[p.gen]
		p.setnx = pipe.HSetNX(ctx, s.keys.indexEntries(p.ref.group, p.gen, p.ref.sub(m)), p.ref.field, p.value)
		gg := groupGen{p.ref.group, p.gen}
		if setBits[gg] == nil {
			order = append(order, gg)
		}
		setBits[gg] = append(setBits[gg], p.ref.bit(m))
		counts[p.gen]++
		if orphanFields[p.ref.group] == nil {
			groups = append(groups, p.ref.group)
		}
		orphanFields[p.ref.group] = append(orphanFields[p.ref.group], k)
	}
	w.legacyOrphanChecks(ctx, pipe)
	if pipe.Len() == 0 {
		return nil
	}
	for _, gg := range order {
		v.bits.set(ctx, pipe, s.keys.indexFilter(gg.group, gg.gen), setBits[gg])
	}
	for g, n := range counts {
		pipe.HIncrBy(ctx, s.keys.indexMeta(), "n:"+strconv.FormatInt(g, 10), n)
	}
	hmgets := make([]*redis.SliceCmd, len(groups))
	for i, g := range groups {
		fields := make([]string, len(orphanFields[g]))
		for j, k := range orphanFields[g] {
			fields[j] = w.todo[k].ref.field
		}
		hmgets[i] = pipe.HMGet(ctx, s.keys.indexOrphans(g), fields...)
	}
	if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
		return redisFailure(op, fmt.Errorf("%d clicks: %w", len(w.todo), err))
	}
	ix.mu.Lock()
	for _, gg := range copies {
		ix.copied[gg] = true
	}
	ix.mu.Unlock()
	for i, g := range groups {
		vals, err := hmgets[i].Result()
		if err != nil {
			return redisFailure(op, fmt.Errorf("orphans of group %d: %w", g, err))
		}
		for j, k := range orphanFields[g] {
			if vals[j] != nil {
				w.todo[k].hasOrphan = true
			}
		}
	}
	// Clicks whose id was in their generation already: the same click
	// (a redelivery) or another one (a duplicate).
	var again []int
	for k, p := range w.todo {
		if p.settled {
			continue
		}
		isNew, err := p.setnx.Result()
		if err != nil {
			return redisFailure(op, fmt.Errorf("click %q: %w", w.clicks[p.i].ClickID, err))
		}
		if isNew {
			w.out[p.i].Status = ClickNew
		} else {
			again = append(again, k)
		}
	}
	if len(again) == 0 {
		return nil
	}
	pipe = s.rdb.Pipeline()
	gets := make([]*redis.StringCmd, len(again))
	for j, k := range again {
		p := w.todo[k]
		gets[j] = pipe.HGet(ctx, s.keys.indexEntries(p.ref.group, p.gen, p.ref.sub(v.subs[p.gen])), p.ref.field)
	}
	if _, err := pipe.Exec(ctx); err != nil {
		return redisFailure(op, fmt.Errorf("%d clicks: entries: %w", len(again), err))
	}
	for j, k := range again {
		p := &w.todo[k]
		b := gets[j].Val()
		if b == p.value {
			w.out[p.i].Status = ClickRedelivered
			continue
		}
		p.settled, p.hasOrphan = true, false
		w.out[p.i].Status = ClickDuplicate
		if err := w.dec.add([]byte(b), p.gen, &w.out[p.i].Existing); err != nil {
			return permanent(op, err)
		}
	}
	return nil
}

// claim takes the orphans found after the writes (see claim.lua).
func (w *clickWrite) claim(ctx context.Context) error {
	const op = "put clicks"
	s := w.s
	var ks []int
	var calls []scriptCall
	for k, p := range w.todo {
		if w.out[p.i].Status == ClickDuplicate || !p.hasOrphan {
			continue
		}
		ks = append(ks, k)
		calls = append(calls, scriptCall{keys: []string{s.keys.indexOrphans(p.ref.group)}, args: []any{p.ref.field}})
	}
	if len(calls) > 0 {
		cmds, err := runPipelined(ctx, s.rdb, claimScript, calls)
		if err != nil {
			return redisFailure(op, fmt.Errorf("%d orphan claims: %w", len(calls), err))
		}
		for j, cmd := range cmds {
			p := w.todo[ks[j]]
			r, _ := cmd.Val().([]any)
			if len(r) == 0 {
				continue // the sweep is expiring it, or it went away
			}
			rec, _ := r[0].(string)
			o, err := parseOrphanRecord(w.clicks[p.i].ClickID, rec)
			if err != nil {
				return permanent(op, err)
			}
			w.out[p.i].Orphan = &o
		}
	}
	return w.legacyClaims(ctx)
}

// LookupConversions joins each conversion to its indexed click or parks it
// as an orphan until the click arrives, and adds parked ones to their
// partition's due set.
//
// It first reads the conversion's click field in every live generation
// from one generation before its window (an entry lingers at most that
// long, and a conversion after its click's window must find the click to
// be refused as such) to the newest (plain HGETs, pipelined): an entry is only ever removed with
// its generation, after every conversion that could join it, so a
// conversion whose click is found is joined without a script. Only the
// others go through lookup.lua, which looks again and parks the conversion
// atomically in the click id's group (see IndexClicks).
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
		if c.ClickID == "" || c.Origin == "" || strings.ContainsRune(c.Origin, '\n') {
			return nil, permanent(op, fmt.Errorf("%w: conversion of click %q from %q", ErrInvalid, c.ClickID, c.Origin))
		}
		if err := validPartition(c.Topic, c.Partition); err != nil {
			return nil, permanent(op, err)
		}
		if c.TS <= -maxExact || c.TS >= maxExact {
			return nil, permanent(op, fmt.Errorf("%w: conversion of click %q at %d", ErrInvalid, c.ClickID, c.TS))
		}
	}
	v, err := s.refreshIndex(ctx, 0, nil)
	if err != nil {
		return nil, err
	}
	results := make([]LookupResult, len(convs))
	refs := make([]clickRef, len(convs))
	spans := make([][2]int64, len(convs)) // generations covered, oldest and newest
	var need []int64
	for i, c := range convs {
		refs[i] = refOf(c.ClickID)
		lo, hi := max(v.gen(c.TS-v.horizonMs)-1, v.retired+1), v.gen(c.TS)+1
		spans[i] = [2]int64{lo, hi}
		for g := lo; g <= hi && len(need) < 64; g++ {
			if _, ok := v.subs[g]; !ok && !containsInt64(need, g) {
				need = append(need, g)
			}
		}
	}
	if len(need) > 0 {
		if v, err = s.refreshIndex(ctx, 0, need); err != nil {
			return nil, err
		}
	}
	// Newer live generations too: a click after its conversion is found
	// (and refused as such by the caller) even when its time is far ahead.
	var newest int64 = noGen
	for g := range v.subs {
		newest = max(newest, g)
	}
	for i := range spans {
		spans[i][1] = max(spans[i][1], newest)
	}
	var dec entryDecoder

	// Phase 1: the clicks already indexed, newest generation first.
	type get struct {
		i   int
		gen int64
		cmd *redis.StringCmd
	}
	var gets []get
	pipe := s.rdb.Pipeline()
	for i := range convs {
		for g := spans[i][1]; g >= spans[i][0]; g-- {
			if m, ok := v.subs[g]; ok {
				gets = append(gets, get{i, g, pipe.HGet(ctx, s.keys.indexEntries(refs[i].group, g, refs[i].sub(m)), refs[i].field)})
			}
		}
	}
	legacy := s.legacyLookups(ctx, pipe, v, convs)
	if pipe.Len() > 0 {
		if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
			return nil, redisFailure(op, fmt.Errorf("%d click entries: %w", len(convs), err))
		}
	}
	for _, g := range gets {
		if results[g.i].Status == LookupFound {
			continue
		}
		b, err := g.cmd.Bytes()
		if errors.Is(err, redis.Nil) {
			continue
		}
		if err != nil {
			return nil, redisFailure(op, fmt.Errorf("click %q: %w", convs[g.i].ClickID, err))
		}
		results[g.i].Status = LookupFound
		if err := dec.add(b, g.gen, &results[g.i].Click); err != nil {
			return nil, permanent(op, err)
		}
	}
	if err := legacy.found(results); err != nil {
		return nil, permanent(op, err)
	}
	type part struct {
		topic string
		p     int
	}
	var pending []int // conversions whose click is unknown, in batch order
	var parts []part
	for i, c := range convs {
		if results[i].Status == LookupFound {
			continue
		}
		pending = append(pending, i)
		if k := (part{c.Topic, c.Partition}); !slices.Contains(parts, k) {
			parts = append(parts, k)
		}
	}
	if len(pending) == 0 {
		if err := dec.run(ctx, s, v.genMs); err != nil {
			return nil, permanent(op, err)
		}
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
	// duplicate), unless the script reports a generation the call did not
	// know (it is learnt, and the conversion tries again); a share of room
	// not used goes back, and the conversions refused in the round for
	// want of room try again. Every round that allows one settles it or
	// learns a generation, and generations are finite, so rounds end.
	//
	// A round takes one conversion per click, the first pending in batch
	// order; the click's later ones wait for the next round. Otherwise a
	// later conversion whose window covers fewer generations could park
	// while the first one is sent back to learn a generation, and the
	// first would then be refused as its duplicate: which conversion of a
	// click counts would depend on when another writer sized a
	// generation, not on the log.
	for round := 0; len(pending) > 0; round++ {
		if round > 64+len(convs) {
			return nil, permanent(op, fmt.Errorf("%w: lookups kept finding new generations", ErrConflict))
		}
		var waiting []int
		taken := make(map[string]bool, len(pending))
		now := make([]int, 0, len(pending))
		for _, i := range pending {
			if id := convs[i].ClickID; taken[id] {
				waiting = append(waiting, i)
			} else {
				taken[id] = true
				now = append(now, i)
			}
		}
		pending = now
		allowed := make([]bool, len(pending))
		calls := make([]scriptCall, len(pending))
		gensOf := make([][]int64, len(pending))
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
			r := refs[i]
			keys := []string{s.keys.indexOrphans(r.group), s.keys.indexGens(r.group)}
			var unknown []any
			for g := spans[i][1]; g >= spans[i][0]; g-- {
				if m, ok := v.subs[g]; ok {
					keys = append(keys, s.keys.indexEntries(r.group, g, r.sub(m)))
					gensOf[j] = append(gensOf[j], g)
				} else if g <= v.gen(c.TS)+1 {
					unknown = append(unknown, strconv.FormatInt(g, 10))
				}
			}
			args := []any{r.field, allow, ttl, c.Origin, c.Deadline, orphanRest(c.TS, c.Raw), len(unknown)}
			calls[j] = scriptCall{keys: keys, args: append(args, unknown...)}
		}
		cmds, err := runPipelined(ctx, s.rdb, lookupScript, calls)
		if err != nil {
			return nil, redisFailure(op, fmt.Errorf("%d conversions: %w", len(calls), err))
		}
		var again []int
		for j, cmd := range cmds {
			i := pending[j]
			c := convs[i]
			r, gen, m, raw, err := lookupReply(cmd, gensOf[j])
			if err != nil {
				return nil, permanent(op, fmt.Errorf("click %q: %w", c.ClickID, err))
			}
			if allowed[j] && r.Status != LookupParked {
				room[part{c.Topic, c.Partition}]++ // its share was not used
			}
			switch {
			case m > 0: // a generation the call did not know
				s.ix.mu.Lock()
				s.ix.subs[gen] = m
				s.ix.mu.Unlock()
				v.subs[gen] = m
				again = append(again, i)
				progress = true
				continue
			case r.Status == LookupCapExceeded && allowed[j]:
				return nil, permanent(op, fmt.Errorf("%w: lookup refused an allowed park", ErrCorrupt))
			}
			results[i] = r
			if r.Status == LookupFound {
				if err := dec.add(raw, gen, &results[i].Click); err != nil {
					return nil, permanent(op, err)
				}
			}
			if r.Status == LookupCapExceeded {
				again = append(again, i)
			}
		}
		pending = pending[:0]
		if progress {
			for _, i := range again {
				if c := convs[i]; results[i].Status != LookupCapExceeded || room[part{c.Topic, c.Partition}] > 0 {
					pending = append(pending, i)
				}
			}
		}
		pending = append(pending, waiting...)
		slices.Sort(pending) // batch order
	}
	if err := dec.run(ctx, s, v.genMs); err != nil {
		return nil, permanent(op, err)
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

// lookupReply reads one reply of lookup.lua: the result, and with
// "found" the generation and entry bytes, with "retry" the generation and
// its size (m > 0).
func lookupReply(cmd *redis.Cmd, gens []int64) (r LookupResult, gen int64, m int, raw []byte, err error) {
	v, _ := cmd.Val().([]any)
	str := func(i int) string {
		if i < len(v) {
			s, _ := v[i].(string)
			return s
		}
		return ""
	}
	switch str(0) {
	case "retry":
		gen, err1 := strconv.ParseInt(str(1), 10, 64)
		m, err2 := strconv.Atoi(str(2))
		if err1 != nil || err2 != nil || m < 1 || m > maxIndexSubs || m&(m-1) != 0 {
			return r, 0, 0, nil, fmt.Errorf("%w: lookup retry %v", ErrCorrupt, v)
		}
		return r, gen, m, nil, nil
	case "found":
		var k int64
		if len(v) > 2 {
			k, _ = v[2].(int64)
		}
		if k < 1 || int(k) > len(gens) {
			return r, 0, 0, nil, fmt.Errorf("%w: lookup found in key %v", ErrCorrupt, v)
		}
		return LookupResult{Status: LookupFound}, gens[k-1], 0, []byte(str(1)), nil
	case "parked":
		return LookupResult{Status: LookupParked}, 0, 0, nil, nil
	case "again":
		return LookupResult{Status: LookupParkedBefore, Claimed: str(1) == "c"}, 0, 0, nil, nil
	case "duplicate":
		return LookupResult{Status: LookupDuplicate, Origin: str(1)}, 0, 0, nil, nil
	case "cap":
		return LookupResult{Status: LookupCapExceeded}, 0, 0, nil, nil
	}
	return r, 0, 0, nil, fmt.Errorf("%w: lookup status %q", ErrCorrupt, str(0))
}

// orphanRest is the binary rest of an orphan record: the conversion time
// (signed varint) and the original bytes.
func orphanRest(ts int64, raw []byte) string {
	b := make([]byte, 0, binary.MaxVarintLen64+len(raw))
	b = binary.AppendVarint(b, ts)
	return string(append(b, raw...))
}

// parseOrphanRecord reads an orphan record (see lookup.lua).
func parseOrphanRecord(clickID, rec string) (Orphan, error) {
	bad := fmt.Errorf("%w: orphan record of click %q", ErrCorrupt, clickID)
	if len(rec) < 2 {
		return Orphan{}, bad
	}
	st := rec[0]
	org, rest, ok1 := strings.Cut(rec[1:], "\n")
	dls, rest, ok2 := strings.Cut(rest, "\n")
	dl, err := strconv.ParseInt(dls, 10, 64)
	topic, part, _, ok3 := splitOrigin(org)
	ts, k := binary.Varint([]byte(rest))
	if !ok1 || !ok2 || err != nil || !ok3 || k <= 0 || (st != 'p' && st != 'c' && st != 'x') {
		return Orphan{}, bad
	}
	return Orphan{
		ClickID: clickID, TS: ts, Origin: org, Topic: topic, Partition: part,
		Deadline: dl, Raw: []byte(rest[k:]), Claimed: st == 'c',
	}, nil
}

// dueBatch is how many due entries DueOrphans settles per round trip.
const dueBatch = 500

// DueOrphans is phase one of the two-phase orphan sweep of topic/partition:
// it marks expiring (with sweeper's name, for diagnosis, in the first
// layout) and returns every parked orphan whose deadline is at or before
// watermark and that no click claimed, together with those marked by an
// earlier sweep that were not settled yet; it deletes the claimed ones.
// The caller then applies or dead-letters the returned orphans (phase
// two) and calls SettleOrphans (phase three); a crash before that makes
// the next sweep return them again, and the conversion markers keep them
// from counting twice.
func (s *Store) DueOrphans(ctx context.Context, topic string, partition int, watermark int64, sweeper string) ([]Orphan, error) {
	const op = "due orphans"
	if err := validPartition(topic, partition); err != nil {
		return nil, permanent(op, err)
	}
	legacy, err := s.legacyBound(ctx)
	if err != nil {
		return nil, err
	}
	dkey := s.keys.due(topic, partition)
	upto := strconv.FormatInt(watermark, 10)
	prefix := partitionField(topic, partition) + "/"
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
			r := refOf(id)
			calls[i] = scriptCall{keys: []string{s.keys.indexOrphans(r.group)}, args: []any{r.field, prefix, watermark}}
		}
		cmds, err := runPipelined(ctx, s.rdb, sweepScript, calls)
		if err != nil {
			return out, redisFailure(op, fmt.Errorf("%s/%d: %w", topic, partition, err))
		}
		replies := make([][]any, len(ids))
		var gone []int
		for i, cmd := range cmds {
			replies[i], _ = cmd.Val().([]any)
			if st, _ := replies[i][0].(string); st == "gone" && legacy != NoTime {
				gone = append(gone, i)
			}
		}
		if err := s.legacySweep(ctx, topic, partition, watermark, sweeper, ids, gone, replies); err != nil {
			return out, err
		}
		var settled []any
		pipe := s.rdb.Pipeline()
		for i, v := range replies {
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
				var o Orphan
				var err error
				if h, ok := v[1].([]any); ok {
					o, err = parseLegacyOrphanReply(ids[i], h)
				} else {
					rec, _ := v[1].(string)
					o, err = parseOrphanRecord(ids[i], rec)
				}
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
	legacy, err := s.legacyBound(ctx)
	if err != nil {
		return err
	}
	pipe := s.rdb.Pipeline()
	members := make([]any, len(clickIDs))
	for i, id := range clickIDs {
		r := refOf(id)
		pipe.HDel(ctx, s.keys.indexOrphans(r.group), r.field)
		if legacy != NoTime {
			pipe.Del(ctx, s.keys.legacyOrphan(id))
		}
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
