package state

import (
	"context"
	"fmt"

	"github.com/redis/go-redis/v9"
)

// HistoryLength is how many allocations an experiment's history keeps; older
// ones are trimmed as new ones are appended. At one publication per
// 15-minute refit tick it covers three weeks.
const HistoryLength = 2016

// history is the list of an experiment's published allocations, oldest
// first, in the experiment's hash slot.
func (k keys) history(experiment string) string { return k.exp(experiment) + ":hist" }

// AppendHistory appends an allocation message (JSON, as published, opaque
// here) to the experiment's history and trims the history to its newest
// HistoryLength entries, both in one MULTI/EXEC transaction.
func (s *Store) AppendHistory(ctx context.Context, experiment string, allocation []byte) error {
	const op = "append history"
	if err := validExperiment(experiment); err != nil {
		return permanent(op, err)
	}
	if len(allocation) == 0 {
		return permanent(op, fmt.Errorf("%w: experiment %q: empty allocation", ErrInvalid, experiment))
	}
	key := s.keys.history(experiment)
	_, err := s.rdb.TxPipelined(ctx, func(p redis.Pipeliner) error {
		p.RPush(ctx, key, allocation)
		p.LTrim(ctx, key, -HistoryLength, -1)
		return nil
	})
	if err != nil {
		return redisFailure(op, fmt.Errorf("experiment %q: %w", experiment, err))
	}
	return nil
}

// History returns the experiment's stored allocation messages, oldest
// first (at most HistoryLength; none if nothing was appended).
func (s *Store) History(ctx context.Context, experiment string) ([][]byte, error) {
	const op = "history"
	if err := validExperiment(experiment); err != nil {
		return nil, permanent(op, err)
	}
	vals, err := s.rdb.LRange(ctx, s.keys.history(experiment), 0, -1).Result()
	if err != nil {
		return nil, redisFailure(op, fmt.Errorf("experiment %q: %w", experiment, err))
	}
	out := make([][]byte, len(vals))
	for i, v := range vals {
		out[i] = []byte(v)
	}
	return out, nil
}
