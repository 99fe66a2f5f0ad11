package state

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"strings"
	"syscall"

	"github.com/redis/go-redis/v9"
)

// Refusals and conditions reported by Store, matched with errors.Is.
var (
	// ErrFenced refuses a delta from an older consumer-group generation than
	// the one already recorded for one of its partitions: it comes from a
	// consumer that lost the partition.
	ErrFenced = errors.New("fenced by a newer consumer generation")
	// ErrOverlap refuses a delta whose offset range partly covers offsets
	// already applied to the experiment.
	ErrOverlap = errors.New("offset range overlaps applied offsets")
	// ErrLayoutMismatch refuses a delta whose layout differs from the one
	// stored for the experiment.
	ErrLayoutMismatch = errors.New("layout differs from the stored layout")
	// ErrNotFound reports a missing experiment, allocation or resume offset.
	ErrNotFound = errors.New("not found")
	// ErrInvalid reports an argument that cannot be stored.
	ErrInvalid = errors.New("invalid argument")
	// ErrCorrupt reports stored data that cannot be parsed.
	ErrCorrupt = errors.New("stored data corrupt")
	// ErrConflict reports a compaction that kept losing its compare-and-set
	// race against writers; trying later is fine.
	ErrConflict = errors.New("concurrent update conflict")
)

// Error is a failed Store operation. Retriable says whether the same call
// may succeed later unchanged (Redis unreachable, timeouts, cluster
// resharding, a compaction conflict); refusals and invalid input are not
// retriable.
type Error struct {
	// Op names the operation, e.g. "apply" or "load".
	Op string
	// Retriable is true when retrying the same call can succeed.
	Retriable bool
	// Err is the underlying cause.
	Err error
}

// Error implements error.
func (e *Error) Error() string {
	kind := "permanent"
	if e.Retriable {
		kind = "retriable"
	}
	return fmt.Sprintf("state: %s (%s): %v", e.Op, kind, e.Err)
}

// Unwrap returns the cause, for errors.Is and errors.As.
func (e *Error) Unwrap() error { return e.Err }

// IsRetriable reports whether err, or an error it wraps, is a retriable
// *Error.
func IsRetriable(err error) bool {
	var e *Error
	return errors.As(err, &e) && e.Retriable
}

// permanent wraps err as a non-retriable failure of op.
func permanent(op string, err error) error {
	return &Error{Op: op, Err: err}
}

// redisFailure wraps an error returned by go-redis for op, classifying it.
func redisFailure(op string, err error) error {
	return &Error{Op: op, Retriable: retriableRedis(err), Err: err}
}

// retriableRedis reports whether a go-redis error is transient: the server
// unreachable, a timeout, a dropped connection, or a server state that
// passes (loading, cluster down or resharding, failover, script busy).
func retriableRedis(err error) bool {
	switch {
	case err == nil:
		return false
	case errors.Is(err, context.Canceled), errors.Is(err, redis.ErrClosed):
		return false
	case errors.Is(err, context.DeadlineExceeded),
		errors.Is(err, io.EOF), errors.Is(err, io.ErrUnexpectedEOF),
		errors.Is(err, syscall.ECONNREFUSED), errors.Is(err, syscall.ECONNRESET),
		errors.Is(err, syscall.EPIPE):
		return true
	}
	var ne net.Error
	if errors.As(err, &ne) {
		return true
	}
	var re redis.Error
	if errors.As(err, &re) {
		msg := re.Error()
		for _, p := range []string{"LOADING", "READONLY", "CLUSTERDOWN", "TRYAGAIN", "MASTERDOWN", "MOVED", "ASK", "BUSY", "NOREPLICAS", "OOM"} {
			if strings.HasPrefix(msg, p+" ") || msg == p {
				return true
			}
		}
		return strings.HasPrefix(msg, "ERR max number of clients")
	}
	// go-redis reports an exhausted pool with a plain error.
	return strings.Contains(err.Error(), "connection pool timeout")
}
