package redistest

import (
	"context"
	"testing"
	"time"
)

// TestStartStopRestart checks that the server answers, stops answering
// after Stop, and answers again on the same port, empty, after Restart.
func TestStartStopRestart(t *testing.T) {
	s := Start(t)
	c := s.Client()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := c.Set(ctx, "k", "v", 0).Err(); err != nil {
		t.Fatalf("set: %v", err)
	}
	port := s.Port()
	s.Stop()
	if err := ping(port); err == nil {
		t.Fatalf("server still answers on %d after Stop", port)
	}
	s.Restart()
	if s.Port() != port {
		t.Fatalf("port changed from %d to %d", port, s.Port())
	}
	n, err := c.Exists(ctx, "k").Result()
	if err != nil {
		t.Fatalf("exists after restart: %v", err)
	}
	if n != 0 {
		t.Fatalf("data survived a restart without persistence")
	}
	if err := s.FlushAll(ctx); err != nil {
		t.Fatalf("flushall: %v", err)
	}
}

// TestCluster checks that the one-node cluster owns every slot, answers a
// cluster client, refuses cross-slot commands, and keeps its slots across
// a restart.
func TestCluster(t *testing.T) {
	s := StartCluster(t)
	c := s.ClusterClient()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := c.Set(ctx, "{a}x", "1", 0).Err(); err != nil {
		t.Fatalf("set: %v", err)
	}
	// "a" and "b" hash to different slots.
	if err := s.Client().MSet(ctx, "a", "1", "b", "2").Err(); err == nil {
		t.Fatalf("cross-slot MSET accepted; not a cluster")
	}
	s.Restart()
	if err := c.Set(ctx, "{a}y", "1", 0).Err(); err != nil {
		t.Fatalf("set after restart: %v", err)
	}
}
