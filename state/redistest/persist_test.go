package redistest

import (
	"context"
	"errors"
	"testing"

	"github.com/redis/go-redis/v9"
)

// TestRestartKeepingData checks that a restart after StopKeepingData keeps
// what was written, and that a plain Stop and Restart afterwards still
// starts empty.
func TestRestartKeepingData(t *testing.T) {
	s := Start(t)
	c := s.Client()
	ctx := context.Background()
	if err := c.Set(ctx, "kept", "v1", 0).Err(); err != nil {
		t.Fatal(err)
	}
	if err := c.HSet(ctx, "{x:a}:h", "f", 7).Err(); err != nil {
		t.Fatal(err)
	}
	s.StopKeepingData()
	if err := c.Ping(ctx).Err(); err == nil {
		t.Fatal("server answers after StopKeepingData")
	}
	s.RestartKeepingData()
	if got, err := c.Get(ctx, "kept").Result(); err != nil || got != "v1" {
		t.Fatalf("after RestartKeepingData: kept = %q, %v; want v1", got, err)
	}
	if got, err := c.HGet(ctx, "{x:a}:h", "f").Int(); err != nil || got != 7 {
		t.Fatalf("after RestartKeepingData: hash field = %d, %v; want 7", got, err)
	}

	s.Stop()
	s.Restart()
	if _, err := c.Get(ctx, "kept").Result(); !errors.Is(err, redis.Nil) {
		t.Fatalf("after a plain restart: kept still there (%v)", err)
	}
}
