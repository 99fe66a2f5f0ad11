package estimator

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"time"
)

// ArmSnapshot is the plain, exported form of an ArmState, for storage and
// inspection. Buckets are listed in start-time order.
type ArmSnapshot struct {
	Layout             Layout   `json:"layout"`
	Watermark          int64    `json:"watermark"`
	Buckets            []Bucket `json:"buckets"`
	MaturedClicks      uint64   `json:"matured_clicks"`
	MaturedConversions uint64   `json:"matured_conversions"`
	Delays             []uint64 `json:"delays"`
	DelayCount         uint64   `json:"delay_count"`
	DelaySumMs         uint64   `json:"delay_sum_ms"`
}

// Bucket is one pending bucket of a snapshot.
type Bucket struct {
	BucketKey
	BucketCounts
}

// Snapshot returns the exported form of s.
func (s *ArmState) Snapshot() ArmSnapshot {
	snap := ArmSnapshot{
		Layout:             s.layout,
		Watermark:          s.watermark,
		MaturedClicks:      s.maturedClicks,
		MaturedConversions: s.maturedConversions,
		Delays:             append([]uint64(nil), s.delays...),
		DelayCount:         s.delayCount,
		DelaySumMs:         s.delaySumMs,
	}
	for _, k := range s.sortedKeys() {
		snap.Buckets = append(snap.Buckets, Bucket{BucketKey: k, BucketCounts: s.buckets[k]})
	}
	return snap
}

// FromSnapshot rebuilds a state from its exported form. Buckets may be given
// at any level no coarser than their canonical one (as partial deltas are);
// the result is advanced to put each in canonical form.
func FromSnapshot(snap ArmSnapshot) (*ArmState, error) {
	l := snap.Layout.WithDefaults()
	if err := l.Validate(); err != nil {
		return nil, fmt.Errorf("arm snapshot: %w", err)
	}
	s := NewArmState(l)
	if len(snap.Delays) != len(s.delays) {
		return nil, fmt.Errorf("arm snapshot: %d delay bins, layout has %d", len(snap.Delays), len(s.delays))
	}
	var conv uint64
	for _, b := range snap.Buckets {
		if b.Level > l.maxLevel() {
			return nil, fmt.Errorf("arm snapshot: bucket level %d above maximum %d", b.Level, l.maxLevel())
		}
		if b.Converted > b.Clicks {
			return nil, fmt.Errorf("arm snapshot: bucket %d/%d has %d conversions for %d clicks", b.Level, b.Index, b.Converted, b.Clicks)
		}
		acc := s.buckets[b.BucketKey]
		acc.Clicks += b.Clicks
		acc.Converted += b.Converted
		s.buckets[b.BucketKey] = acc
		conv += b.Converted
	}
	if snap.MaturedConversions > snap.MaturedClicks {
		return nil, fmt.Errorf("arm snapshot: %d matured conversions for %d matured clicks", snap.MaturedConversions, snap.MaturedClicks)
	}
	s.maturedClicks = snap.MaturedClicks
	s.maturedConversions = snap.MaturedConversions
	copy(s.delays, snap.Delays)
	s.delayCount = snap.DelayCount
	s.delaySumMs = snap.DelaySumMs
	wm := snap.Watermark
	if wm != noWatermark {
		// Re-key at the stored watermark: Advance only acts on a later one.
		s.watermark = wm - 1
		s.Advance(wm)
	}
	return s, nil
}

// binaryVersion is the first byte of MarshalBinary's output.
const binaryVersion = 1

// MarshalBinary encodes s compactly: varints, buckets in start order with
// delta-coded indices, zero histogram bins run-length coded.
func (s *ArmState) MarshalBinary() ([]byte, error) {
	snap := s.Snapshot()
	b := make([]byte, 0, 64+8*len(snap.Buckets)+2*len(snap.Delays))
	b = append(b, binaryVersion)
	b = binary.AppendVarint(b, s.layout.Window.Milliseconds())
	b = binary.AppendVarint(b, s.layout.Base.Milliseconds())
	b = binary.LittleEndian.AppendUint64(b, math.Float64bits(s.layout.AgeError))
	b = binary.AppendUvarint(b, uint64(s.layout.BinsPerDecade))
	b = binary.AppendVarint(b, snap.Watermark)
	b = binary.AppendUvarint(b, snap.MaturedClicks)
	b = binary.AppendUvarint(b, snap.MaturedConversions)
	b = binary.AppendUvarint(b, snap.DelayCount)
	b = binary.AppendUvarint(b, snap.DelaySumMs)
	b = binary.AppendUvarint(b, uint64(len(snap.Delays)))
	for i := 0; i < len(snap.Delays); {
		if snap.Delays[i] == 0 {
			j := i
			for j < len(snap.Delays) && snap.Delays[j] == 0 {
				j++
			}
			b = binary.AppendUvarint(b, 0)
			b = binary.AppendUvarint(b, uint64(j-i))
			i = j
			continue
		}
		b = binary.AppendUvarint(b, snap.Delays[i])
		i++
	}
	b = binary.AppendUvarint(b, uint64(len(snap.Buckets)))
	var prev int64
	for _, k := range snap.Buckets {
		b = append(b, k.Level)
		b = binary.AppendVarint(b, k.Index-prev)
		prev = k.Index
		b = binary.AppendUvarint(b, k.Clicks)
		b = binary.AppendUvarint(b, k.Converted)
	}
	return b, nil
}

// errShort reports a truncated encoding.
var errShort = errors.New("truncated")

type reader struct {
	b   []byte
	err error
}

func (r *reader) uvarint() uint64 {
	if r.err != nil {
		return 0
	}
	v, n := binary.Uvarint(r.b)
	if n <= 0 {
		r.err = errShort
		return 0
	}
	r.b = r.b[n:]
	return v
}

func (r *reader) varint() int64 {
	if r.err != nil {
		return 0
	}
	v, n := binary.Varint(r.b)
	if n <= 0 {
		r.err = errShort
		return 0
	}
	r.b = r.b[n:]
	return v
}

func (r *reader) byte1() byte {
	if r.err != nil || len(r.b) < 1 {
		r.err = errShort
		return 0
	}
	v := r.b[0]
	r.b = r.b[1:]
	return v
}

func (r *reader) fixed64() uint64 {
	if r.err != nil || len(r.b) < 8 {
		r.err = errShort
		return 0
	}
	v := binary.LittleEndian.Uint64(r.b)
	r.b = r.b[8:]
	return v
}

// maxDecodedLen bounds slice lengths read from untrusted bytes.
const maxDecodedLen = 1 << 20

// UnmarshalBinary decodes the output of MarshalBinary into s.
func (s *ArmState) UnmarshalBinary(data []byte) error {
	r := &reader{b: data}
	if v := r.byte1(); r.err == nil && v != binaryVersion {
		return fmt.Errorf("decode arm state: unknown version %d", v)
	}
	var snap ArmSnapshot
	snap.Layout.Window = time.Duration(r.varint()) * time.Millisecond
	snap.Layout.Base = time.Duration(r.varint()) * time.Millisecond
	snap.Layout.AgeError = math.Float64frombits(r.fixed64())
	snap.Layout.BinsPerDecade = int(r.uvarint())
	snap.Watermark = r.varint()
	snap.MaturedClicks = r.uvarint()
	snap.MaturedConversions = r.uvarint()
	snap.DelayCount = r.uvarint()
	snap.DelaySumMs = r.uvarint()
	nd := r.uvarint()
	if nd > maxDecodedLen {
		return fmt.Errorf("decode arm state: %d delay bins", nd)
	}
	for uint64(len(snap.Delays)) < nd && r.err == nil {
		v := r.uvarint()
		if v != 0 {
			snap.Delays = append(snap.Delays, v)
			continue
		}
		run := r.uvarint()
		if run == 0 || uint64(len(snap.Delays))+run > nd {
			return fmt.Errorf("decode arm state: bad zero run %d", run)
		}
		for ; run > 0; run-- {
			snap.Delays = append(snap.Delays, 0)
		}
	}
	nb := r.uvarint()
	if nb > maxDecodedLen {
		return fmt.Errorf("decode arm state: %d buckets", nb)
	}
	var prev int64
	for i := uint64(0); i < nb && r.err == nil; i++ {
		var k Bucket
		k.Level = r.byte1()
		k.Index = prev + r.varint()
		prev = k.Index
		k.Clicks = r.uvarint()
		k.Converted = r.uvarint()
		snap.Buckets = append(snap.Buckets, k)
	}
	if r.err != nil {
		return fmt.Errorf("decode arm state: %w", r.err)
	}
	if len(r.b) != 0 {
		return fmt.Errorf("decode arm state: %d trailing bytes", len(r.b))
	}
	got, err := FromSnapshot(snap)
	if err != nil {
		return fmt.Errorf("decode arm state: %w", err)
	}
	*s = *got
	return nil
}
