package state

import (
	"fmt"
	"math"
	"slices"
	"strconv"
	"strings"
)

// keys builds every key name; see the package documentation for the layout.
type keys struct{ prefix string }

// experiments is the discovery set of experiment ids (no hash tag: it is
// never used in a script with other keys).
func (k keys) experiments() string { return k.prefix + ":experiments" }

// exp is the common start of an experiment's keys, hash tag included.
func (k keys) exp(experiment string) string { return k.prefix + ":{x:" + experiment + "}" }

func (k keys) meta(experiment string) string { return k.exp(experiment) + ":meta" }
func (k keys) arms(experiment string) string { return k.exp(experiment) + ":arms" }
func (k keys) offsets(experiment string) string {
	return k.exp(experiment) + ":off"
}
func (k keys) arm(experiment, arm string) string { return k.exp(experiment) + ":a:" + arm }
func (k keys) marker(experiment, clickID string) string {
	return k.exp(experiment) + ":cv:" + clickID
}

// legacyClick and legacyOrphan are a click's entry and parked conversion
// in the first layout of the click index (one key per click); the index
// reads them until they expire (see state/legacyindex.go).
func (k keys) legacyClick(clickID string) string  { return k.prefix + ":{k:" + clickID + "}:c" }
func (k keys) legacyOrphan(clickID string) string { return k.prefix + ":{k:" + clickID + "}:o" }

// indexMeta is the click index descriptor and indexDict its dictionary
// of arm and topic names (see state/indexmeta.go); both share the tag
// {i}, apart from every index group.
func (k keys) indexMeta() string { return k.prefix + ":{i}:meta" }
func (k keys) indexDict() string { return k.prefix + ":{i}:dict" }

// indexGroup is the common start of the keys of index group g, hash tag
// included: every key a click id uses lives in its group's slot.
func (k keys) indexGroup(g int) string { return k.prefix + ":{i:" + strconv.Itoa(g) + "}" }

// indexEntries is sub-key sub of generation gen of group g: a hash of
// click fields to entries.
func (k keys) indexEntries(g int, gen int64, sub int) string {
	return k.indexGroup(g) + ":" + strconv.FormatInt(gen, 10) + ":" + strconv.Itoa(sub)
}

// indexFilter is the bitmap of generation gen of group g that screens
// click ids before their entries are read.
func (k keys) indexFilter(g int, gen int64) string {
	return k.indexGroup(g) + ":" + strconv.FormatInt(gen, 10) + ":f"
}

// indexGens is group g's copy of the sub-key count of each live
// generation; indexOrphans the conversions parked in group g.
func (k keys) indexGens(g int) string    { return k.indexGroup(g) + ":g" }
func (k keys) indexOrphans(g int) string { return k.indexGroup(g) + ":o" }

// due is the deadline set of the orphans parked by a conversion partition.
func (k keys) due(topic string, partition int) string {
	return k.prefix + ":{o:" + partitionField(topic, partition) + "}:due"
}

// resume is the resume offset of a partition.
func (k keys) resume(topic string, partition int) string {
	return k.prefix + ":{g:" + partitionField(topic, partition) + "}:resume"
}

// partitionField names a topic partition in the offsets hash and in keys.
func partitionField(topic string, partition int) string {
	return topic + "/" + strconv.Itoa(partition)
}

// parsePartitionField splits "<topic>/<partition>".
func parsePartitionField(f string) (TopicPartition, error) {
	i := strings.LastIndexByte(f, '/')
	if i <= 0 {
		return TopicPartition{}, fmt.Errorf("%w: offsets field %q", ErrCorrupt, f)
	}
	p, err := strconv.Atoi(f[i+1:])
	if err != nil || p < 0 {
		return TopicPartition{}, fmt.Errorf("%w: offsets field %q", ErrCorrupt, f)
	}
	return TopicPartition{Topic: f[:i], Partition: p}, nil
}

// maxExact is the largest integer every Lua number (a double) holds
// exactly; watermarks and offsets compared in scripts must stay within it.
const maxExact = 1 << 53

// validExperiment checks an experiment id: non-empty, no braces (a '}'
// would end the hash tag early and let two experiments' keys collide).
func validExperiment(id string) error {
	if id == "" {
		return fmt.Errorf("%w: empty experiment id", ErrInvalid)
	}
	if strings.ContainsAny(id, "{}") {
		return fmt.Errorf("%w: experiment id %q contains '{' or '}'", ErrInvalid, id)
	}
	return nil
}

// validPartition checks a topic partition.
func validPartition(topic string, partition int) error {
	if topic == "" || strings.ContainsAny(topic, "{}") {
		return fmt.Errorf("%w: topic %q must be non-empty without '{' or '}'", ErrInvalid, topic)
	}
	if partition < 0 || partition > math.MaxInt32 {
		return fmt.Errorf("%w: partition %d out of range", ErrInvalid, partition)
	}
	return nil
}

func parseInt(s string) (int64, error) {
	v, err := strconv.ParseInt(s, 10, 64)
	if err != nil {
		return 0, fmt.Errorf("%w: integer %q", ErrCorrupt, s)
	}
	return v, nil
}

func sortStrings(s []string) { slices.Sort(s) }
