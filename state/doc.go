// Package state owns every Redis key and Lua script of Ripen: the per-arm
// estimator state of each experiment, the Kafka offsets (and consumer-group
// generations) applied to it, allocations, the click index that joins
// conversions to clicks, and the orphan conversions parked until their click
// arrives.
//
// Keys of one experiment share the hash tag {x:<experiment>} so that a
// delta, its conversion markers and the offsets it covers are applied by one
// atomic script even on Redis Cluster; the click index keeps many clicks per
// key, and every key a click id uses (its entries in each generation, the
// conversion parked for it) shares its group's tag {i:<group>}, so that
// parking a conversion and indexing its click are atomic with each other.
// Store works with a single server and with a cluster client alike.
//
// Apply is idempotent: a delta whose offsets were already recorded is
// skipped, so a retried script call (go-redis retries after read timeouts)
// or a redelivered Kafka batch never counts twice. Load rebuilds each arm's
// estimator.ArmState in canonical form at the stored watermark, whatever the
// bucket levels the deltas were written at.
//
// An arm hash holds a compact base and one record per Apply since the
// last compaction (state/armformat.go); Apply compacts an arm whose
// records pass Options.CompactFields or Options.CompactBytes, so the hash
// stays small whatever the traffic and the refit period.
//
// A conversion's delta can land before its click's (they are consumed from
// different partitions); Load then holds the conversion back (Experiment.Held)
// until the click lands. Compact rewrites an arm hash into its base at the
// stored watermark with a compare-and-set script, keeping held
// conversions, so it is safe beside concurrent writers.
//
// Errors are *Error values that say whether the failure is worth retrying
// (IsRetriable); the refusals ErrFenced, ErrOverlap and ErrLayoutMismatch
// are not, and are matched with errors.Is.
package state
