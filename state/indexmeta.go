package state

import (
	"context"
	"fmt"
	"math"
	"math/bits"
	"math/rand/v2"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"
)

// The click index (second layout) keeps many clicks per Redis key: a click
// id belongs to one of indexGroups groups (its hash tag, so one slot of a
// cluster) and, by its click time, to one generation (GenerationLength
// wide); a generation of a group is split into a power-of-two number of
// sub-keys, chosen when the generation is first written from the clicks
// of the generation before, so that each sub-key holds about
// indexKeyFields clicks and stays in Redis's compact listpack encoding.
// A generation is deleted as a whole once the watermark passes its end
// plus the horizon (the longest attribution window) and a slack
// (Options.ClickTTLSlack), so an entry never goes before its window and
// the slack have passed and is gone at most one generation after. DEVELOPERS.md ("Key layouts") describes every key byte by byte.

// Layout constants of the click index. Changing one changes the layout:
// raise indexVersion and describe the upgrade in DEVELOPERS.md.
const (
	// indexVersion is the layout version recorded in the descriptor.
	indexVersion = 2
	// indexGroups is the number of hash-tag groups.
	indexGroups = 256
	// indexKeyFields is the number of clicks a sub-key is sized for; as
	// the sub-key count is a power of two, a sub-key of a generation as
	// busy as the one before holds half to all of it.
	indexKeyFields = 48
	// indexFilterBitsPerSub is the filter size per sub-key: about 20 to 40
	// bits per click, so that the filter lets about 3% of the ids it does
	// not hold through (a false positive costs one HGET).
	indexFilterBitsPerSub = 1024
	// maxIndexSubs bounds the sub-keys of one generation of one group.
	maxIndexSubs = 1 << 16
	// noGen marks "no generation" (nothing retired yet).
	noGen = math.MinInt64
)

// ClickIndexOptions configure OpenClickIndex.
type ClickIndexOptions struct {
	// Horizon is the longest attribution window of the experiments whose
	// clicks are indexed; a conversion is looked up among the clicks of
	// the horizon before it. The stored horizon only grows. Default: 7d.
	Horizon time.Duration
	// ProgressTopics are the input topics whose recorded progress dates
	// the first layout's entries when an index is created over state that
	// one wrote (see LegacyUntil). Default: none.
	ProgressTopics []string
}

// ClickIndexInfo describes the stored click index.
type ClickIndexInfo struct {
	// Version is the layout version (2).
	Version int
	// Generation is the generation length.
	Generation time.Duration
	// Horizon is the stored horizon.
	Horizon time.Duration
	// Retired is the last generation deleted (its number: event time
	// divided by Generation), or math.MinInt64 if none.
	Retired int64
	// LegacyUntil is the event time (Unix ms) up to which conversions and
	// clicks are also looked up in the first layout's keys, or NoTime when
	// the index was created without earlier state.
	LegacyUntil int64
}

// indexState is what a Store caches of the click index descriptor and
// dictionary. Generation sizes and dictionary entries never change once
// written, so they are cached for good; horizon, retirement and the
// legacy bound are read again with every call.
type indexState struct {
	mu        sync.Mutex
	open      bool
	epoch     string // the descriptor's creation id; a new one resets the caches
	genMs     int64
	horizonMs int64
	retired   int64
	legacy    int64
	subs      map[int64]int // sub-keys per generation
	bits      filterBits    // how the server's filter bits are read and set
	copied    map[groupGen]bool
	names     map[string]uint64 // "a:<exp>\n<arm>" or "t:<topic>" -> id
	byID      map[uint64]string // id -> "a:..." or "t:..."
}

// groupGen names one generation of one group.
type groupGen struct {
	group int
	gen   int64
}

// OpenClickIndex creates the click index descriptor if there is none, or
// raises its horizon, and returns it. A Store opens the index itself on
// first use with the windows it sees; the service opens it at start with
// the longest configured window. When the descriptor is created over a
// prefix that already holds experiments (state written by the first
// layout), the first layout's keys are read as well for conversions and
// clicks up to LegacyUntil: the latest event time any partition of
// ProgressTopics reported plus the horizon.
func (s *Store) OpenClickIndex(ctx context.Context, o ClickIndexOptions) (ClickIndexInfo, error) {
	const op = "open click index"
	if o.Horizon == 0 {
		o.Horizon = 7 * 24 * time.Hour
	}
	if o.Horizon < time.Second {
		return ClickIndexInfo{}, permanent(op, fmt.Errorf("%w: horizon %v below 1s", ErrInvalid, o.Horizon))
	}
	h := o.Horizon.Milliseconds()
	exists, err := s.rdb.HExists(ctx, s.keys.indexMeta(), "v").Result()
	if err != nil {
		return ClickIndexInfo{}, redisFailure(op, err)
	}
	legacy := ""
	if !exists {
		n, err := s.rdb.SCard(ctx, s.keys.experiments()).Result()
		if err != nil {
			return ClickIndexInfo{}, redisFailure(op, err)
		}
		if n > 0 {
			u, err := s.latestSeen(ctx, o.ProgressTopics)
			if err != nil {
				return ClickIndexInfo{}, err
			}
			legacy = strconv.FormatInt(u+h+s.opts.ClickTTLSlack.Milliseconds(), 10)
		}
	}
	genMs := (h + int64(s.opts.IndexGenerations) - 1) / int64(s.opts.IndexGenerations)
	genMs = (genMs + 999) / 1000 * 1000
	v, err := indexOpenScript.Run(ctx, s.rdb, []string{s.keys.indexMeta()}, indexVersion, genMs, h, legacy, strconv.FormatUint(rand.Uint64(), 36)).Slice()
	if err != nil {
		return ClickIndexInfo{}, redisFailure(op, err)
	}
	if len(v) != 2 {
		return ClickIndexInfo{}, permanent(op, fmt.Errorf("%w: open reply %v", ErrCorrupt, v))
	}
	if st, _ := v[0].(string); st == "version" {
		return ClickIndexInfo{}, permanent(op, fmt.Errorf("%w: click index layout version %v, this build reads %d", ErrCorrupt, v[1], indexVersion))
	}
	meta, err := flatHash(v[1])
	if err != nil {
		return ClickIndexInfo{}, permanent(op, err)
	}
	// BITFIELD, or one command per bit where the server lacks it.
	perBit := false
	if err := s.rdb.BitField(ctx, s.keys.indexMeta()+":probe", "GET", "u1", 0).Err(); err != nil {
		if !strings.Contains(strings.ToLower(err.Error()), "unknown command") {
			return ClickIndexInfo{}, redisFailure(op, fmt.Errorf("probe BITFIELD: %w", err))
		}
		perBit = true
	}
	ix := &s.ix
	ix.mu.Lock()
	defer ix.mu.Unlock()
	if err := ix.setMeta(meta); err != nil {
		return ClickIndexInfo{}, permanent(op, err)
	}
	ix.bits = filterBits{perBit: perBit}
	ix.open = true
	return ix.info(), nil
}

// latestSeen is the latest event time any partition of topics reported,
// or 0 if none did.
func (s *Store) latestSeen(ctx context.Context, topics []string) (int64, error) {
	var u int64
	if len(topics) == 0 {
		return u, nil
	}
	prog, err := s.Progress(ctx, topics...)
	if err != nil {
		return 0, err
	}
	for _, parts := range prog {
		for _, p := range parts {
			if p.Seen != NoTime {
				u = max(u, p.Seen)
			}
		}
	}
	return u, nil
}

// info returns the cached descriptor. ix.mu must be held.
func (ix *indexState) info() ClickIndexInfo {
	return ClickIndexInfo{
		Version: indexVersion, Generation: time.Duration(ix.genMs) * time.Millisecond,
		Horizon: time.Duration(ix.horizonMs) * time.Millisecond, Retired: ix.retired, LegacyUntil: ix.legacy,
	}
}

// setMeta caches the descriptor fields g, h, r and legacy. A descriptor
// created anew (another epoch: the index was lost, say by a restart
// without persistence, and created again) drops every cached size and
// dictionary id. ix.mu must be held.
func (ix *indexState) setMeta(meta map[string]string) error {
	if e := meta["e"]; e != ix.epoch {
		ix.epoch = e
		ix.subs = nil
	}
	g, err1 := parseInt(meta["g"])
	h, err2 := parseInt(meta["h"])
	if err1 != nil || err2 != nil || g < 1 || h < 1 {
		return fmt.Errorf("%w: click index descriptor %v", ErrCorrupt, meta)
	}
	ix.genMs, ix.horizonMs = g, h
	ix.retired, ix.legacy = noGen, NoTime
	if v, ok := meta["r"]; ok {
		if ix.retired, err1 = parseInt(v); err1 != nil {
			return err1
		}
	}
	if v, ok := meta["legacy"]; ok {
		if ix.legacy, err1 = parseInt(v); err1 != nil {
			return err1
		}
	}
	if ix.subs == nil {
		ix.subs = map[int64]int{}
		ix.copied = map[groupGen]bool{}
		ix.names = map[string]uint64{}
		ix.byID = map[uint64]string{}
	}
	for f, v := range meta {
		gs, ok := strings.CutPrefix(f, "m:")
		if !ok {
			continue
		}
		gen, err1 := strconv.ParseInt(gs, 10, 64)
		m, err2 := strconv.Atoi(v)
		if err1 != nil || err2 != nil || m < 1 || m > maxIndexSubs || m&(m-1) != 0 {
			return fmt.Errorf("%w: click index generation field %s=%q", ErrCorrupt, f, v)
		}
		ix.subs[gen] = m
	}
	return nil
}

// indexView is one call's view of the index descriptor.
type indexView struct {
	genMs, horizonMs, retired, legacy int64
	subs                              map[int64]int // known generations, not retired
	bits                              filterBits
}

// filterBits reads and sets filter bits: with BITFIELD, one command per
// key, or, on a server without it (the embedded store `ripen demo` runs
// when no redis-server is installed), with GETBIT and SETBIT, one command
// per bit.
type filterBits struct{ perBit bool }

// get queues reads of the bits at offsets of key and returns a function
// that gives them once the pipeline ran.
func (f filterBits) get(ctx context.Context, pipe redis.Pipeliner, key string, offsets []int64) func() ([]int64, error) {
	if !f.perBit {
		args := make([]any, 0, 3*len(offsets))
		for _, o := range offsets {
			args = append(args, "GET", "u1", o)
		}
		cmd := pipe.BitField(ctx, key, args...)
		return cmd.Result
	}
	cmds := make([]*redis.IntCmd, len(offsets))
	for i, o := range offsets {
		cmds[i] = pipe.GetBit(ctx, key, o)
	}
	return func() ([]int64, error) {
		out := make([]int64, len(cmds))
		for i, c := range cmds {
			v, err := c.Result()
			if err != nil {
				return nil, err
			}
			out[i] = v
		}
		return out, nil
	}
}

// set queues setting the bits at offsets of key.
func (f filterBits) set(ctx context.Context, pipe redis.Pipeliner, key string, offsets []int64) {
	if !f.perBit {
		args := make([]any, 0, 4*len(offsets))
		for _, o := range offsets {
			args = append(args, "SET", "u1", o, 1)
		}
		pipe.BitField(ctx, key, args...)
		return
	}
	for _, o := range offsets {
		pipe.SetBit(ctx, key, o, 1)
	}
}

// gen is the generation of event time t.
func (v indexView) gen(t int64) int64 { return floorDiv64(t, v.genMs) }

// refreshIndex opens the index if needed (with horizon, or the default),
// reads the descriptor's horizon, retirement and legacy bound, and the
// sizes of gens not cached yet, and returns the view the call works with.
func (s *Store) refreshIndex(ctx context.Context, horizon time.Duration, gens []int64) (indexView, error) {
	ix := &s.ix
	ix.mu.Lock()
	open := ix.open && horizon.Milliseconds() <= ix.horizonMs
	ix.mu.Unlock()
	if !open {
		if _, err := s.OpenClickIndex(ctx, ClickIndexOptions{Horizon: horizon}); err != nil {
			return indexView{}, err
		}
	}
	ix.mu.Lock()
	var missing []int64
	for _, g := range gens {
		if _, ok := ix.subs[g]; !ok && !containsInt64(missing, g) {
			missing = append(missing, g)
		}
	}
	ix.mu.Unlock()
	fields := []string{"e", "g", "h", "r", "legacy"}
	for _, g := range missing {
		fields = append(fields, "m:"+strconv.FormatInt(g, 10))
	}
	vals, err := s.rdb.HMGet(ctx, s.keys.indexMeta(), fields...).Result()
	if err != nil {
		return indexView{}, redisFailure("click index", err)
	}
	meta := map[string]string{}
	for i, f := range fields {
		if v, ok := vals[i].(string); ok {
			meta[f] = v
		}
	}
	if meta["g"] == "" {
		// The descriptor is gone (the index was lost): create it again.
		ix.mu.Lock()
		h := time.Duration(max(ix.horizonMs, horizon.Milliseconds())) * time.Millisecond
		ix.open = false
		ix.mu.Unlock()
		if _, err := s.OpenClickIndex(ctx, ClickIndexOptions{Horizon: h}); err != nil {
			return indexView{}, err
		}
		return s.refreshIndex(ctx, horizon, gens)
	}
	ix.mu.Lock()
	defer ix.mu.Unlock()
	if err := ix.setMeta(meta); err != nil {
		return indexView{}, permanent("click index", err)
	}
	return ix.view(), nil
}

// view copies the live generations' sizes. ix.mu must be held.
func (ix *indexState) view() indexView {
	v := indexView{genMs: ix.genMs, horizonMs: ix.horizonMs, retired: ix.retired, legacy: ix.legacy, subs: make(map[int64]int, len(ix.subs)), bits: ix.bits}
	for g, m := range ix.subs {
		if g > ix.retired {
			v.subs[g] = m
		}
	}
	return v
}

func containsInt64(xs []int64, x int64) bool {
	for _, y := range xs {
		if y == x {
			return true
		}
	}
	return false
}

// sizeGenerations decides the sub-key count of every generation of gens
// that has none yet: from the clicks indexed in the two generations
// before or est (clicks of the generation expected from the batch at
// hand), whichever is larger. The first decision stored wins (HSETNX), so
// every Store uses the same count. It updates v.
func (s *Store) sizeGenerations(ctx context.Context, v *indexView, gens []int64, est map[int64]float64) error {
	var todo []int64
	for _, g := range gens {
		if _, ok := v.subs[g]; !ok && !containsInt64(todo, g) {
			todo = append(todo, g)
		}
	}
	if len(todo) == 0 {
		return nil
	}
	const op = "size click index generation"
	fields := make([]string, 0, 2*len(todo))
	for _, g := range todo {
		fields = append(fields, "n:"+strconv.FormatInt(g-1, 10), "n:"+strconv.FormatInt(g-2, 10))
	}
	vals, err := s.rdb.HMGet(ctx, s.keys.indexMeta(), fields...).Result()
	if err != nil {
		return redisFailure(op, err)
	}
	pipe := s.rdb.Pipeline()
	gets := make([]*redis.StringCmd, len(todo))
	for i, g := range todo {
		// The generations before may have been cut short (the index was
		// created, or traffic resumed, within them), so the batch's own
		// rate counts too.
		n := est[g]
		for _, x := range vals[2*i : 2*i+2] {
			if str, ok := x.(string); ok {
				if c, err := strconv.ParseFloat(str, 64); err == nil {
					n = max(n, c)
				}
			}
		}
		f := "m:" + strconv.FormatInt(g, 10)
		pipe.HSetNX(ctx, s.keys.indexMeta(), f, subsFor(n))
		gets[i] = pipe.HGet(ctx, s.keys.indexMeta(), f)
	}
	if _, err := pipe.Exec(ctx); err != nil {
		return redisFailure(op, err)
	}
	ix := &s.ix
	ix.mu.Lock()
	defer ix.mu.Unlock()
	for i, g := range todo {
		m, err := strconv.Atoi(gets[i].Val())
		if err != nil || m < 1 || m > maxIndexSubs || m&(m-1) != 0 {
			return permanent(op, fmt.Errorf("%w: generation %d size %q", ErrCorrupt, g, gets[i].Val()))
		}
		ix.subs[g] = m
		v.subs[g] = m
	}
	return nil
}

// subsFor is the sub-key count for a generation of n clicks: the power of
// two that puts at most indexKeyFields clicks in each sub-key of each
// group, within [1, maxIndexSubs].
func subsFor(n float64) int {
	want := n / (indexGroups * indexKeyFields)
	if !(want > 1) {
		return 1
	}
	if want >= maxIndexSubs {
		return maxIndexSubs
	}
	return 1 << bits.Len64(uint64(math.Ceil(want))-1)
}

// dictIDs returns the ids of names ("a:<experiment>\n<arm>" or
// "t:<topic>") in the index dictionary, assigning one if it has none.
func (s *Store) dictIDs(ctx context.Context, names []string) (map[string]uint64, error) {
	ix := &s.ix
	out := make(map[string]uint64, len(names))
	var todo []string
	ix.mu.Lock()
	for _, n := range names {
		if id, ok := ix.names[n]; ok {
			out[n] = id
		} else if _, dup := out[n]; !dup {
			todo = append(todo, n)
			out[n] = 0
		}
	}
	ix.mu.Unlock()
	if len(todo) == 0 {
		return out, nil
	}
	calls := make([]scriptCall, len(todo))
	for i, n := range todo {
		calls[i] = scriptCall{keys: []string{s.keys.indexDict()}, args: []any{n}}
	}
	cmds, err := runPipelined(ctx, s.rdb, dictScript, calls)
	if err != nil {
		return nil, redisFailure("click index dictionary", err)
	}
	ix.mu.Lock()
	defer ix.mu.Unlock()
	for i, n := range todo {
		id, err := cmds[i].Int64()
		if err != nil || id < 1 {
			return nil, permanent("click index dictionary", fmt.Errorf("%w: id of %q: %v", ErrCorrupt, n, err))
		}
		ix.names[n], ix.byID[uint64(id)] = uint64(id), n
		out[n] = uint64(id)
	}
	return out, nil
}

// dictNames returns the names of ids, reading the ones not cached.
func (s *Store) dictNames(ctx context.Context, ids []uint64) (map[uint64]string, error) {
	ix := &s.ix
	out := make(map[uint64]string, len(ids))
	var todo []uint64
	ix.mu.Lock()
	for _, id := range ids {
		if n, ok := ix.byID[id]; ok {
			out[id] = n
		} else if _, dup := out[id]; !dup {
			todo = append(todo, id)
			out[id] = ""
		}
	}
	ix.mu.Unlock()
	if len(todo) == 0 {
		return out, nil
	}
	fields := make([]string, len(todo))
	for i, id := range todo {
		fields[i] = "#" + strconv.FormatUint(id, 10)
	}
	vals, err := s.rdb.HMGet(ctx, s.keys.indexDict(), fields...).Result()
	if err != nil {
		return nil, redisFailure("click index dictionary", err)
	}
	ix.mu.Lock()
	defer ix.mu.Unlock()
	for i, id := range todo {
		n, ok := vals[i].(string)
		if !ok {
			return nil, permanent("click index dictionary", fmt.Errorf("%w: no name for id %d", ErrCorrupt, id))
		}
		ix.names[n], ix.byID[id] = id, n
		out[id] = n
	}
	return out, nil
}

// armName and topicName are dictionary names.
func armName(experiment, arm string) string { return "a:" + experiment + "\n" + arm }
func topicName(topic string) string         { return "t:" + topic }

// RetireResult says what RetireClickIndex did.
type RetireResult struct {
	// Generations are the generations deleted.
	Generations []int64
	// Keys is the number of keys deleted.
	Keys int
	// Next is the watermark from which a call can retire the oldest
	// generation left, or NoTime when none is left.
	Next int64
}

// retireBatch is the number of keys deleted per round trip.
const retireBatch = 4096

// RetireClickIndex deletes every generation of the click index that ends
// at least the horizon plus Options.ClickTTLSlack before watermark (an
// event time, Unix ms): its entries, filters and sizes. An entry thus
// lives until the watermark has passed its click time plus the horizon
// plus the slack (a margin for conversions later than the pipeline's
// lateness), and at most one generation longer. It is idempotent, and any Store may call it; the service calls
// it from the owner of the click topic's first partition. Once the
// watermark has passed the first layout's horizon plus the orphan TTL,
// the legacy bound is cleared too.
func (s *Store) RetireClickIndex(ctx context.Context, watermark int64) (RetireResult, error) {
	const op = "retire click index"
	res := RetireResult{Next: NoTime}
	meta, err := s.rdb.HGetAll(ctx, s.keys.indexMeta()).Result()
	if err != nil {
		return res, redisFailure(op, err)
	}
	if len(meta) == 0 {
		return res, nil
	}
	ix := &s.ix
	ix.mu.Lock()
	err = ix.setMeta(meta)
	v := ix.view()
	ix.mu.Unlock()
	if err != nil {
		return res, permanent(op, err)
	}
	keep := v.horizonMs + s.opts.ClickTTLSlack.Milliseconds()
	through := floorDiv64(watermark-keep, v.genMs) - 1
	var gens []int64
	for g := range v.subs {
		if g <= through {
			gens = append(gens, g)
		} else if next := (g+1)*v.genMs + keep; res.Next == NoTime || next < res.Next {
			res.Next = next
		}
	}
	slices.Sort(gens)
	for _, g := range gens {
		m := v.subs[g]
		gs := strconv.FormatInt(g, 10)
		var keys []string
		flush := func() error {
			if len(keys) == 0 {
				return nil
			}
			pipe := s.rdb.Pipeline()
			for _, k := range keys {
				pipe.Unlink(ctx, k)
			}
			_, err := pipe.Exec(ctx)
			res.Keys += len(keys)
			keys = keys[:0]
			return err
		}
		for grp := range indexGroups {
			for sub := range m {
				keys = append(keys, s.keys.indexEntries(grp, g, sub))
			}
			keys = append(keys, s.keys.indexFilter(grp, g))
			if len(keys) >= retireBatch {
				if err := flush(); err != nil {
					return res, redisFailure(op, err)
				}
			}
		}
		if err := flush(); err != nil {
			return res, redisFailure(op, err)
		}
		pipe := s.rdb.Pipeline()
		for grp := range indexGroups {
			pipe.HDel(ctx, s.keys.indexGens(grp), gs)
		}
		if _, err := pipe.Exec(ctx); err != nil {
			return res, redisFailure(op, err)
		}
		// The descriptor goes last: a crash before leaves the sizes, and
		// the next call deletes the generation again.
		pipe = s.rdb.Pipeline()
		pipe.HDel(ctx, s.keys.indexMeta(), "m:"+gs, "n:"+gs)
		pipe.HSet(ctx, s.keys.indexMeta(), "r", max(g, v.retired))
		if _, err := pipe.Exec(ctx); err != nil {
			return res, redisFailure(op, err)
		}
		ix.mu.Lock()
		delete(ix.subs, g)
		for grp := range indexGroups {
			delete(ix.copied, groupGen{grp, g})
		}
		ix.retired = max(ix.retired, g)
		ix.mu.Unlock()
		res.Generations = append(res.Generations, g)
	}
	if v.legacy != NoTime && watermark > v.legacy+s.opts.OrphanTTL.Milliseconds() {
		if err := s.rdb.HDel(ctx, s.keys.indexMeta(), "legacy").Err(); err != nil {
			return res, redisFailure(op, err)
		}
		ix.mu.Lock()
		ix.legacy = NoTime
		ix.mu.Unlock()
	}
	return res, nil
}

func floorDiv64(a, b int64) int64 {
	q := a / b
	if a%b != 0 && (a < 0) != (b < 0) {
		q--
	}
	return q
}
