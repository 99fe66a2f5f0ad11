package state

import (
	"context"
	"errors"
	"fmt"
	"strings"

	"github.com/redis/go-redis/v9"
)

// Live prefix pointer. A deployment's configured prefix is its root; the
// key <root>:live names the prefix whose state is in use (absent: the root
// itself). A replay rebuilds state under a fresh prefix and then points
// <root>:live at it with one SET, so consumers move over atomically.

// LiveKey returns the key of the live prefix pointer under root.
func LiveKey(root string) string { return root + ":live" }

// raiseSeqScript sets an experiment's allocation sequence to at least
// ARGV[1] and returns the resulting sequence (single key, cluster-safe).
var raiseSeqScript = redis.NewScript(`
local cur = tonumber(redis.call('HGET', KEYS[1], 'seq') or '0')
local floor = tonumber(ARGV[1])
if floor > cur then
  redis.call('HSET', KEYS[1], 'seq', floor)
  return floor
end
return cur
`)

// validPrefix reports what is wrong with a key prefix.
func validPrefix(p string) error {
	switch {
	case p == "":
		return fmt.Errorf("%w: empty prefix", ErrInvalid)
	case strings.ContainsAny(p, "{}"):
		return fmt.Errorf("%w: prefix %q must not contain '{' or '}'", ErrInvalid, p)
	case strings.ContainsAny(p, " \t\r\n"):
		return fmt.Errorf("%w: prefix %q must not contain blanks", ErrInvalid, p)
	}
	return nil
}

// WithPrefix returns a Store on the same Redis client and options, with
// another key prefix (for instance the one the live pointer names).
func (s *Store) WithPrefix(prefix string) (*Store, error) {
	if err := validPrefix(prefix); err != nil {
		return nil, permanent("with prefix", err)
	}
	o := s.opts
	o.Prefix = prefix
	return New(s.rdb, o)
}

// LivePrefix returns the prefix the live pointer under this Store's prefix
// (the root) names, or the root itself when no pointer is set.
func (s *Store) LivePrefix(ctx context.Context) (string, error) {
	const op = "live prefix"
	v, err := s.rdb.Get(ctx, LiveKey(s.opts.Prefix)).Result()
	switch {
	case errors.Is(err, redis.Nil):
		return s.opts.Prefix, nil
	case err != nil:
		return "", redisFailure(op, fmt.Errorf("%s: %w", LiveKey(s.opts.Prefix), err))
	}
	if err := validPrefix(v); err != nil {
		return "", permanent(op, fmt.Errorf("%s: %w", LiveKey(s.opts.Prefix), err))
	}
	return v, nil
}

// SetLivePrefix points the live pointer under this Store's prefix (the
// root) at prefix, in one SET: every reader sees either the old or the new
// prefix.
func (s *Store) SetLivePrefix(ctx context.Context, prefix string) error {
	const op = "set live prefix"
	if err := validPrefix(prefix); err != nil {
		return permanent(op, err)
	}
	if err := s.rdb.Set(ctx, LiveKey(s.opts.Prefix), prefix, 0).Err(); err != nil {
		return redisFailure(op, fmt.Errorf("%s: %w", LiveKey(s.opts.Prefix), err))
	}
	return nil
}

// Empty reports whether the prefix holds no experiment and no key of the
// state layout (a fresh prefix for a replay).
func (s *Store) Empty(ctx context.Context) (bool, error) {
	ok, err := s.isEmpty(ctx)
	if err != nil {
		return false, redisFailure("empty", err)
	}
	if !ok {
		return false, nil
	}
	n, err := s.rdb.Exists(ctx, LiveKey(s.opts.Prefix)).Result()
	if err != nil {
		return false, redisFailure("empty", err)
	}
	return n == 0, nil
}

// AllocationSeq returns the experiment's allocation sequence number: that
// of its latest allocation, or the floor RaiseAllocationSeq set; 0 if
// neither.
func (s *Store) AllocationSeq(ctx context.Context, experiment string) (int64, error) {
	const op = "allocation seq"
	if err := validExperiment(experiment); err != nil {
		return 0, permanent(op, err)
	}
	v, err := s.rdb.HGet(ctx, s.keys.meta(experiment), "seq").Result()
	switch {
	case errors.Is(err, redis.Nil):
		return 0, nil
	case err != nil:
		return 0, redisFailure(op, fmt.Errorf("experiment %q: %w", experiment, err))
	}
	seq, err := parseInt(v)
	if err != nil {
		return 0, permanent(op, fmt.Errorf("experiment %q: %w", experiment, err))
	}
	return seq, nil
}

// RaiseAllocationSeq raises the experiment's allocation sequence number to
// at least floor, atomically, and returns the resulting number; the next
// SaveAllocation returns one more. It never lowers it, and it leaves the
// stored allocation (if any) as it is.
func (s *Store) RaiseAllocationSeq(ctx context.Context, experiment string, floor int64) (int64, error) {
	const op = "raise allocation seq"
	if err := validExperiment(experiment); err != nil {
		return 0, permanent(op, err)
	}
	if floor < 0 {
		return 0, permanent(op, fmt.Errorf("%w: experiment %q: negative floor %d", ErrInvalid, experiment, floor))
	}
	seq, err := raiseSeqScript.Run(ctx, s.rdb, []string{s.keys.meta(experiment)}, floor).Int64()
	if err != nil {
		return 0, redisFailure(op, fmt.Errorf("experiment %q: %w", experiment, err))
	}
	return seq, nil
}
