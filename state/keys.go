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

// click is a click's index entry; orphan the conversion parked for it.
func (k keys) click(clickID string) string  { return k.prefix + ":{k:" + clickID + "}:c" }
func (k keys) orphan(clickID string) string { return k.prefix + ":{k:" + clickID + "}:o" }

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
