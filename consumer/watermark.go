package consumer

import (
	"hash/fnv"
	"math"

	"ripen/state"
)

// noTime marks an event time not known yet.
const noTime = state.NoTime

// forever stands for "no bound" in the minimum computations below.
const forever = int64(math.MaxInt64)

// groupTimes is what one instance knows of the event-time progress of the
// whole consumer group, computed from the progress every partition's owner
// recorded in Redis (state.PartitionProgress) and from Kafka metadata. A
// partition whose log was empty when the generation started and that never
// reported is left out of all of them; any other partition that has not
// reported yet leaves them unknown.
//
//   - watermark: the minimum over every partition of both input topics of
//     the latest event time seen, minus the lateness. An idle partition
//     (caught up with no new event for pipeline.idle_timeout of wall clock)
//     is left out until it gets an event again; when every partition is
//     idle the watermark is the latest time seen anywhere (nothing is in
//     flight). The wall clock thus only decides liveness at the head of the
//     log: a partition that lags is never idle, so replays never take this
//     path while they catch up. The watermark never moves backwards.
//   - applied: the minimum over the partitions (idle ones included) of the
//     time through which each applied its events (see appliedThrough).
//   - swept: the minimum over the conversion partitions of the last tick
//     through which their owner settled the due orphans.
//   - boundary: the hold-back boundary, one refit period after the last
//     tick whose refits every click partition's owner completed; events
//     after it are held back (see genState.release). Unknown until every
//     click partition's owner marked a tick.
//   - oldestSeen: the minimum over every partition, idle ones included, of
//     the latest event time seen. Unlike the watermark it does not run
//     ahead when the busy partitions are caught up: a quiet partition may
//     still bring events of its own time (see genState.retire).
//   - clicksApplied: the minimum over the click partitions of the time
//     through which each applied its events: conversions up to it find
//     their click indexed (see genState.release).
type groupTimes struct {
	watermark     int64
	applied       int64
	swept         int64
	boundary      int64
	oldestSeen    int64
	clicksApplied int64
}

// unknownTimes is a groupTimes that knows nothing.
var unknownTimes = groupTimes{watermark: noTime, applied: noTime, swept: noTime, boundary: noTime, oldestSeen: noTime, clicksApplied: noTime}

// partitionMeta is what the generation knows of every partition of the
// input topics.
type partitionMeta struct {
	// all lists every partition of the click and conversion topics.
	all []state.TopicPartition
	// empty marks partitions whose log held no message when the
	// generation started.
	empty map[state.TopicPartition]bool
	// clickTopic and clickParts name the click topic and its partition
	// count (refit ownership and the boundary use them).
	clickTopic string
	clickParts int
}

// computeGroupTimes derives groupTimes from the recorded progress; prev is
// the previous watermark (it never moves back).
func computeGroupTimes(meta partitionMeta, prog map[string]map[int]state.PartitionProgress, latenessMs, periodMs, prev int64) groupTimes {
	gt := unknownTimes
	gt.watermark = prev
	low, high, oldest := forever, noTime, forever
	applied, swept, clicks := forever, forever, forever
	active, known, appliedKnown, sweptKnown := false, true, true, true
	for _, tp := range meta.all {
		rec, ok := prog[tp.Topic][tp.Partition]
		if !ok || rec.Seen == noTime {
			if !meta.empty[tp] {
				known = false
			}
			continue
		}
		high = max(high, rec.Seen)
		oldest = min(oldest, rec.Seen)
		if rec.Applied == noTime {
			appliedKnown = false
		} else {
			applied = min(applied, rec.Applied)
			if tp.Topic == meta.clickTopic {
				clicks = min(clicks, rec.Applied)
			}
		}
		if tp.Topic != meta.clickTopic {
			if rec.Swept == noTime {
				sweptKnown = false
			} else {
				swept = min(swept, rec.Swept)
			}
		}
		if rec.Idle {
			continue
		}
		active = true
		low = min(low, rec.Seen)
	}
	if known && high != noTime {
		cand := high
		if active {
			cand = low - latenessMs
		}
		if gt.watermark == noTime || cand > gt.watermark {
			gt.watermark = cand
		}
	}
	if known && appliedKnown && applied != forever {
		gt.applied = applied
	}
	if known && oldest != forever {
		gt.oldestSeen = oldest
	}
	if known && appliedKnown {
		gt.clicksApplied = clicks // forever when no click partition reported
	}
	if known && sweptKnown {
		gt.swept = swept // forever when no conversion partition reported
	}
	done := forever
	for p := range meta.clickParts {
		rec, ok := prog[meta.clickTopic][p]
		if !ok || rec.Refitted == noTime {
			done = noTime
			break
		}
		done = min(done, rec.Refitted)
	}
	if done != noTime && done != forever {
		gt.boundary = done + periodMs
	}
	return gt
}

// sweepWatermark returns the event time through which the due orphans may
// be settled now: the watermark, but only once every partition applied its
// events through the hold-back boundary, and never past it. The boundary
// does not move until the refits of its tick are done, which wait for
// this sweep; so at that moment exactly the events released by the
// boundary are applied, whoever applied them, and what expires (rather
// than joins a click) is a function of the logs alone. While the boundary
// is unknown nothing was applied and nothing is parked: vacuous is set and
// the sweep may be recorded without sweeping, at the last tick the group
// applied through. ok is false when nothing may be swept yet.
func (gt groupTimes) sweepWatermark(periodMs int64) (wm int64, vacuous, ok bool) {
	switch {
	case gt.watermark == noTime || gt.applied == noTime:
		return 0, false, false
	case gt.boundary == noTime:
		return floorDiv(min(gt.watermark, gt.applied), periodMs) * periodMs, true, true
	case gt.applied < gt.boundary:
		return 0, false, false
	}
	return min(gt.watermark, gt.boundary), false, true
}

// refitThrough returns the last refit tick (a multiple of periodMs) whose
// refits may run: every partition applied its events through it, the
// watermark passed it and the orphans due by it were settled; false if
// not known yet.
func (gt groupTimes) refitThrough(periodMs int64) (int64, bool) {
	if gt.watermark == noTime || gt.applied == noTime || gt.swept == noTime {
		return 0, false
	}
	return floorDiv(min(gt.watermark, gt.applied, gt.swept), periodMs) * periodMs, true
}

// keyWatermark is the watermark the bucket keys of a flush's deltas are
// computed at: the watermark, but not past the hold-back boundary; else
// fallback (keys computed early are merely finer than canonical; reading
// re-keys them).
func (gt groupTimes) keyWatermark(fallback int64) int64 {
	switch {
	case gt.watermark == noTime:
		return fallback
	case gt.boundary == noTime:
		return gt.watermark
	}
	return min(gt.watermark, gt.boundary)
}

// appliedThrough is the applied-through time an owner reports for one of
// its partitions after a flush: every event of the partition whose
// prefix maximum (the largest event time at or before it in the log) is
// at or before it has been applied. Events are released in log order up to
// the first one after the hold-back boundary (genState.release), so:
// with a held event, everything with a prefix maximum below its time is
// applied; with none, everything read is, and every unread event has a
// prefix maximum at least the latest time read (seen). An idle partition
// with nothing held claims the boundary: it is caught up, and an event
// that comes later is late. The claim is a property of the log, whoever
// applied the events; NoTime (nothing read yet) leaves the recorded claim
// of an earlier owner as it is.
func appliedThrough(gt groupTimes, idle bool, firstHeld, seen int64) int64 {
	x := forever
	if gt.boundary != noTime {
		x = gt.boundary
	}
	switch {
	case firstHeld != noTime:
		x = min(x, firstHeld-1)
	case idle:
	case seen == noTime:
		return noTime
	default:
		x = min(x, seen-1)
	}
	if x == forever {
		return gt.watermark
	}
	return x
}

// refitPartition returns the click partition whose owner refits and
// publishes experiment id: FNV-1a (32-bit) of the id modulo the number of
// click partitions. The group's assignment thus decides who refits, with
// no coordinator of our own.
func refitPartition(id string, clickParts int) int {
	if clickParts <= 0 {
		return 0
	}
	h := fnv.New32a()
	_, _ = h.Write([]byte(id))
	return int(h.Sum32() % uint32(clickParts))
}

func floorDiv(a, b int64) int64 {
	q := a / b
	if a%b != 0 && (a < 0) != (b < 0) {
		q--
	}
	return q
}
