package state

import (
	"encoding/binary"
	"fmt"
	"math/bits"
	"slices"
	"strconv"
	"strings"

	"ripen/estimator"
)

// The arm hash <p>:{x:<experiment>}:a:<arm> holds one arm's counts in
// three kinds of fields, all of which add up (see DEVELOPERS.md, "Key
// layouts", for the byte-level description):
//
//   - "z", the base: every count the arm had at its last compaction, in
//     the binary encoding of encodeBase (at most one).
//   - "u:<n>" and "c:<n>", records: what the n-th Apply since the last
//     compaction added to the arm: its clicks in the binary encoding of a
//     base ("u:"), and the conversions it counted as text pairs
//     "<field> <count> <field> <count> ..." whose field names are those
//     of the first layout below ("c:"; the apply script writes them). "#"
//     counts the Applies that wrote records (it names the next) and "#b"
//     adds up the records' bytes.
//   - The first layout's counter fields, which only hashes written before
//     records existed hold: "b:<level>:<index>" clicks and
//     "v:<level>:<index>" conversions of a pending bucket, "mc" and "mv"
//     matured clicks and conversions, "d:<bin>" delay bins, "dn" and "ds"
//     the delay count and sum in ms. Load reads them, and the first
//     compaction folds them into the base.
//
// An Apply writes one record per arm instead of one counter per bucket,
// so its cost does not grow with the buckets a delta touches, and the
// hash grows by one field per Apply; Apply compacts an arm whose records
// pass Options.CompactFields fields or Options.CompactBytes bytes, which
// bounds the hash whatever the traffic and the refit period.

// Field names of the arm hash.
const (
	armBaseField    = "z"
	armRecordPrefix = "u:"
	armConvPrefix   = "c:"
	armCountField   = "#"
	armBytesField   = "#b"
)

// armBaseVersion is the first byte of every base the package writes.
const armBaseVersion = 1

// armCounts are the counts of an arm hash: as parsed, in whatever
// (possibly finer than canonical) buckets they were written, or, from
// canonicalize, re-keyed to canonical buckets at one watermark.
type armCounts struct {
	clicks, converted  map[estimator.BucketKey]uint64
	maturedClicks      uint64
	maturedConversions uint64
	delays             []uint64
	delayCount         uint64
	delaySumMs         uint64
}

// newArmCounts returns empty counts with nbins delay bins.
func newArmCounts(nbins int) armCounts {
	return armCounts{
		clicks:    make(map[estimator.BucketKey]uint64),
		converted: make(map[estimator.BucketKey]uint64),
		delays:    make([]uint64, nbins),
	}
}

// addTo adds n to *p, refusing an overflow.
func addTo(p *uint64, n uint64) error {
	v, carry := bits.Add64(*p, n, 0)
	if carry != 0 || v > 1<<63-1 {
		return fmt.Errorf("%w: count overflows", ErrCorrupt)
	}
	*p = v
	return nil
}

// addField adds n to the count a first-layout field names (see the
// layout description above).
func (a *armCounts) addField(f string, n uint64) error {
	switch {
	case f == "mc":
		return addTo(&a.maturedClicks, n)
	case f == "mv":
		return addTo(&a.maturedConversions, n)
	case f == "dn":
		return addTo(&a.delayCount, n)
	case f == "ds":
		return addTo(&a.delaySumMs, n)
	case strings.HasPrefix(f, "d:"):
		i, err := strconv.Atoi(f[2:])
		if err != nil || i < 0 || i >= len(a.delays) {
			return fmt.Errorf("%w: delay field %q of %d bins", ErrCorrupt, f, len(a.delays))
		}
		return addTo(&a.delays[i], n)
	case strings.HasPrefix(f, "b:"), strings.HasPrefix(f, "v:"):
		lv, idx, ok := strings.Cut(f[2:], ":")
		level, err1 := strconv.ParseUint(lv, 10, 8)
		index, err2 := strconv.ParseInt(idx, 10, 64)
		if !ok || err1 != nil || err2 != nil {
			return fmt.Errorf("%w: bucket field %q", ErrCorrupt, f)
		}
		m := a.clicks
		if f[0] == 'v' {
			m = a.converted
		}
		k := estimator.BucketKey{Level: uint8(level), Index: index}
		v := m[k]
		if err := addTo(&v, n); err != nil {
			return err
		}
		m[k] = v
		return nil
	}
	return fmt.Errorf("%w: unknown arm field %q", ErrCorrupt, f)
}

// parseCount reads a stored count: a decimal integer >= 0.
func parseCount(f, v string) (uint64, error) {
	n, err := strconv.ParseInt(v, 10, 64)
	if err != nil || n < 0 {
		return 0, fmt.Errorf("%w: field %s=%q", ErrCorrupt, f, v)
	}
	return uint64(n), nil
}

// addRecord adds a record's "<field> <count> ..." pairs.
func (a *armCounts) addRecord(rec string) error {
	for rec != "" {
		f, rest, ok1 := strings.Cut(rec, " ")
		v, rest2, _ := strings.Cut(rest, " ")
		if !ok1 || f == "" || v == "" {
			return fmt.Errorf("%w: record %.40q", ErrCorrupt, rec)
		}
		n, err := parseCount(f, v)
		if err != nil {
			return err
		}
		if err := a.addField(f, n); err != nil {
			return err
		}
		rec = rest2
	}
	return nil
}

// parseArmHash reads an arm hash of either layout (see above) into counts
// as written, not canonical yet.
func parseArmHash(h map[string]string, nbins int) (armCounts, error) {
	a := newArmCounts(nbins)
	for f, v := range h {
		var err error
		switch {
		case f == armBaseField:
			err = a.addBase([]byte(v))
		case strings.HasPrefix(f, armRecordPrefix):
			err = a.addBase([]byte(v))
		case strings.HasPrefix(f, armConvPrefix):
			err = a.addRecord(v)
		case f == armCountField, f == armBytesField:
			_, err = parseCount(f, v)
		default:
			var n uint64
			if n, err = parseCount(f, v); err == nil {
				err = a.addField(f, n)
			}
		}
		if err != nil {
			return a, err
		}
	}
	return a, nil
}

// fields is the arm hash holding exactly c's counts: its base alone, or
// nothing when every count is zero. Held-back conversions are kept.
func (c armCounts) fields() map[string]string {
	b := c.encodeBase()
	if b == nil {
		return map[string]string{}
	}
	return map[string]string{armBaseField: string(b)}
}

// encodeBase writes c as a base: the version byte, then, as unsigned
// varints unless said otherwise, the click buckets and the conversion
// buckets (each: a count of buckets, then per bucket in (level, index)
// order its level, its index as a signed varint difference from the
// previous bucket's index of the same level, or from 0, and its count),
// the matured clicks and conversions, the non-zero delay bins (a count,
// then bin and count pairs), the delay count and the delay sum. Zero
// counts are left out. It returns nil when every count is zero.
func (c armCounts) encodeBase() []byte {
	empty := c.maturedClicks == 0 && c.maturedConversions == 0 && c.delayCount == 0 && c.delaySumMs == 0
	var nz []int
	for i, n := range c.delays {
		if n > 0 {
			nz = append(nz, i)
		}
	}
	b := []byte{armBaseVersion}
	buckets := func(m map[estimator.BucketKey]uint64) {
		keys := make([]estimator.BucketKey, 0, len(m))
		for k, n := range m {
			if n > 0 {
				keys = append(keys, k)
			}
		}
		slices.SortFunc(keys, compareBucketKeys)
		b = binary.AppendUvarint(b, uint64(len(keys)))
		prevLevel, prev := -1, int64(0)
		for _, k := range keys {
			if int(k.Level) != prevLevel {
				prevLevel, prev = int(k.Level), 0
			}
			b = append(b, k.Level)
			b = binary.AppendVarint(b, k.Index-prev)
			b = binary.AppendUvarint(b, m[k])
			prev = k.Index
		}
		empty = empty && len(keys) == 0
	}
	buckets(c.clicks)
	buckets(c.converted)
	b = binary.AppendUvarint(b, c.maturedClicks)
	b = binary.AppendUvarint(b, c.maturedConversions)
	b = binary.AppendUvarint(b, uint64(len(nz)))
	for _, i := range nz {
		b = binary.AppendUvarint(b, uint64(i))
		b = binary.AppendUvarint(b, c.delays[i])
	}
	b = binary.AppendUvarint(b, c.delayCount)
	b = binary.AppendUvarint(b, c.delaySumMs)
	if empty && len(nz) == 0 {
		return nil
	}
	return b
}

// addBase adds a base written by encodeBase.
func (a *armCounts) addBase(b []byte) error {
	bad := func(what string) error { return fmt.Errorf("%w: arm base: %s", ErrCorrupt, what) }
	if len(b) == 0 || b[0] != armBaseVersion {
		return bad("unknown version")
	}
	rest := b[1:]
	uv := func() (uint64, bool) {
		v, k := binary.Uvarint(rest)
		if k <= 0 {
			return 0, false
		}
		rest = rest[k:]
		return v, true
	}
	buckets := func(m map[estimator.BucketKey]uint64) error {
		n, ok := uv()
		if !ok || n > uint64(len(rest)) {
			return bad("bucket count")
		}
		prevLevel, prev := -1, int64(0)
		for range n {
			if len(rest) == 0 {
				return bad("truncated bucket")
			}
			level := rest[0]
			rest = rest[1:]
			d, k := binary.Varint(rest)
			if k <= 0 {
				return bad("bucket index")
			}
			rest = rest[k:]
			cnt, ok := uv()
			if !ok {
				return bad("bucket count")
			}
			if int(level) != prevLevel {
				prevLevel, prev = int(level), 0
			}
			prev += d
			key := estimator.BucketKey{Level: level, Index: prev}
			v := m[key]
			if err := addTo(&v, cnt); err != nil {
				return err
			}
			m[key] = v
		}
		return nil
	}
	if err := buckets(a.clicks); err != nil {
		return err
	}
	if err := buckets(a.converted); err != nil {
		return err
	}
	for _, p := range []*uint64{&a.maturedClicks, &a.maturedConversions} {
		v, ok := uv()
		if !ok {
			return bad("matured totals")
		}
		if err := addTo(p, v); err != nil {
			return err
		}
	}
	n, ok := uv()
	if !ok || n > uint64(len(a.delays)) {
		return bad("delay bins")
	}
	for range n {
		i, ok1 := uv()
		v, ok2 := uv()
		if !ok1 || !ok2 || i >= uint64(len(a.delays)) {
			return bad("delay bin")
		}
		if err := addTo(&a.delays[i], v); err != nil {
			return err
		}
	}
	for _, p := range []*uint64{&a.delayCount, &a.delaySumMs} {
		v, ok := uv()
		if !ok {
			return bad("delay totals")
		}
		if err := addTo(p, v); err != nil {
			return err
		}
	}
	if len(rest) != 0 {
		return bad("trailing bytes")
	}
	return nil
}

// compareBucketKeys orders bucket keys by level, then index.
func compareBucketKeys(x, y estimator.BucketKey) int {
	if x.Level != y.Level {
		return int(x.Level) - int(y.Level)
	}
	switch {
	case x.Index < y.Index:
		return -1
	case x.Index > y.Index:
		return 1
	}
	return 0
}

// clickRecord is the click part of an arm's record: its pending click
// buckets and matured clicks in the base encoding; "" when there are none.
func clickRecord(clicks map[estimator.BucketKey]uint64, matured uint64) string {
	c := armCounts{clicks: clicks, maturedClicks: matured}
	return string(c.encodeBase())
}
