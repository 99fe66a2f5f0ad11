package redistest

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"time"

	"github.com/redis/go-redis/v9"
)

// dumpFile is the file redis-server writes its dataset to on SHUTDOWN SAVE
// and loads at start, in the server's directory.
const dumpFile = "dump.rdb"

// StopKeepingData stops the server after it wrote its whole dataset to
// disk (SHUTDOWN SAVE), so that RestartKeepingData brings back every write
// it acknowledged, as a server persisting to an append-only file would
// after a restart. Use it to simulate an outage that loses nothing; Stop
// and Restart simulate one that loses everything.
func (s *Server) StopKeepingData() {
	s.t.Helper()
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.cmd == nil {
		return
	}
	c := redis.NewClient(&redis.Options{Addr: s.Addr(), MaxRetries: -1})
	ctx, cancel := context.WithTimeout(context.Background(), stopTimeout)
	// The server closes the connection instead of answering a successful
	// SHUTDOWN, so the reply error is not a verdict; its exit is.
	err := c.Do(ctx, "SHUTDOWN", "SAVE").Err()
	cancel()
	_ = c.Close()
	select {
	case <-s.exited:
	case <-time.After(stopTimeout):
		_ = s.cmd.Process.Kill()
		<-s.exited
		s.cmd = nil
		s.t.Fatalf("redistest: SHUTDOWN SAVE on port %d did not stop the server (%v): %s", s.port, err, tail(s.logPath()))
	}
	s.cmd = nil
	if _, statErr := os.Stat(filepath.Join(s.dir, dumpFile)); statErr != nil {
		s.t.Fatalf("redistest: SHUTDOWN SAVE on port %d wrote no %s (%v): %s", s.port, dumpFile, errors.Join(err, statErr), tail(s.logPath()))
	}
}

// RestartKeepingData starts the server again on the same port with the
// dataset saved by StopKeepingData, which must have been called before.
// The saved file is removed once loaded, so that a later Restart starts
// empty as documented.
func (s *Server) RestartKeepingData() {
	s.t.Helper()
	path := filepath.Join(s.dir, dumpFile)
	if _, err := os.Stat(path); err != nil {
		s.t.Fatalf("redistest: RestartKeepingData without StopKeepingData: %v", err)
	}
	// The server answers PING only after it loaded the file.
	s.Restart()
	if err := os.Remove(path); err != nil {
		s.t.Fatalf("redistest: remove %s after restart: %v", path, err)
	}
}

// logPath is the server's log file (see launch).
func (s *Server) logPath() string {
	return filepath.Join(s.dir, fmt.Sprintf("redis-%d.log", s.port))
}
