package state

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
)

func TestOptionsValidate(t *testing.T) {
	cases := []struct {
		name string
		o    Options
		bad  string // substring of the error, "" if valid
	}{
		{"defaults", Options{}, ""},
		{"custom", Options{Prefix: "p1", ClickTTLSlack: time.Minute, OrphanTTL: time.Second, MaxParkedOrphans: 3, CompactAttempts: 1}, ""},
		{"brace in prefix", Options{Prefix: "a{b"}, "prefix"},
		{"negative slack", Options{ClickTTLSlack: -time.Second}, "slack"},
		{"tiny orphan ttl", Options{OrphanTTL: time.Microsecond}, "orphan TTL"},
		{"negative cap", Options{MaxParkedOrphans: -1}, "orphans"},
		{"negative attempts", Options{CompactAttempts: -2}, "attempts"},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			err := tc.o.Validate()
			if tc.bad == "" && err != nil {
				t.Fatalf("unexpected error %v", err)
			}
			if tc.bad != "" && (err == nil || !strings.Contains(err.Error(), tc.bad)) {
				t.Fatalf("error %v, want one about %q", err, tc.bad)
			}
		})
	}
	d := Options{}.WithDefaults()
	if d.Prefix != "ripen" || d.ClickTTLSlack != time.Hour || d.OrphanTTL != time.Hour || d.MaxParkedOrphans != 100_000 || d.CompactAttempts != 8 {
		t.Errorf("defaults %+v", d)
	}
	if _, err := New(nil, Options{}); !errors.Is(err, ErrInvalid) {
		t.Errorf("New(nil) = %v", err)
	}
	if _, err := New(redis.NewClient(&redis.Options{}), Options{Prefix: "}"}); !errors.Is(err, ErrInvalid) {
		t.Errorf("New with bad prefix = %v", err)
	}
}

func TestRetriable(t *testing.T) {
	timeout := &net.OpError{Op: "read", Net: "tcp", Err: &timeoutErr{}}
	cases := []struct {
		err  error
		want bool
	}{
		{io.EOF, true},
		{syscall.ECONNREFUSED, true},
		{fmt.Errorf("dial: %w", syscall.ECONNREFUSED), true},
		{timeout, true},
		{context.DeadlineExceeded, true},
		{context.Canceled, false},
		{redis.ErrClosed, false},
		{errors.New("LOADING Redis is loading the dataset in memory"), false}, // not a Redis reply
		{redisErr("LOADING Redis is loading the dataset in memory"), true},
		{redisErr("CLUSTERDOWN The cluster is down"), true},
		{redisErr("ERR Error running script"), false},
		{redisErr("WRONGTYPE Operation against a key holding the wrong kind of value"), false},
	}
	for _, tc := range cases {
		err := redisFailure("op", tc.err)
		if got := IsRetriable(err); got != tc.want {
			t.Errorf("IsRetriable(%v) = %v, want %v", tc.err, got, tc.want)
		}
		if !errors.Is(err, tc.err) {
			t.Errorf("%v does not wrap its cause", err)
		}
	}
	refusal := permanent("apply", fmt.Errorf("%w: x", ErrFenced))
	var e *Error
	if IsRetriable(refusal) || !errors.Is(refusal, ErrFenced) || !errors.As(refusal, &e) || e.Op != "apply" {
		t.Errorf("refusal %v: retriable=%v", refusal, IsRetriable(refusal))
	}
	if IsRetriable(nil) || IsRetriable(errors.New("plain")) {
		t.Errorf("nil or plain errors reported retriable")
	}
}

type timeoutErr struct{}

func (*timeoutErr) Error() string   { return "i/o timeout" }
func (*timeoutErr) Timeout() bool   { return true }
func (*timeoutErr) Temporary() bool { return true }

// redisErr is an error reply as go-redis returns it.
type redisErr string

func (e redisErr) Error() string { return string(e) }
func (redisErr) RedisError()     {}

func TestAllocationAndResume(t *testing.T) {
	s, _, _ := newStore(t, Options{})
	ctx := testCtx(t)
	if _, _, err := s.LatestAllocation(ctx, "e"); !errors.Is(err, ErrNotFound) {
		t.Fatalf("latest before any: %v", err)
	}
	for i, js := range []string{`{"a":0.5}`, `{"a":0.7}`} {
		seq, err := s.SaveAllocation(ctx, "e", []byte(js))
		if err != nil || seq != int64(i+1) {
			t.Fatalf("save %d: seq %d err %v", i, seq, err)
		}
		gotSeq, got, err := s.LatestAllocation(ctx, "e")
		if err != nil || gotSeq != seq || string(got) != js {
			t.Fatalf("latest %d: %d %s %v", i, gotSeq, got, err)
		}
	}
	if _, err := s.Resume(ctx, "clicks", 3); !errors.Is(err, ErrNotFound) {
		t.Fatalf("resume before set: %v", err)
	}
	if err := s.SetResume(ctx, "clicks", 3, 1234); err != nil {
		t.Fatal(err)
	}
	if off, err := s.Resume(ctx, "clicks", 3); err != nil || off != 1234 {
		t.Fatalf("resume %d %v", off, err)
	}
	if _, err := s.Load(ctx, "unknown"); !errors.Is(err, ErrNotFound) || IsRetriable(err) {
		t.Fatalf("load unknown: %v", err)
	}
}
