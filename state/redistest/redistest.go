// Package redistest runs a throwaway redis-server for tests: on a free
// loopback port, without persistence, in a temporary directory, stopped when
// the test ends. It can stop and restart the same server on the same port so
// that tests can simulate an outage.
//
// When redis-server is not on PATH the test is skipped, unless the CI
// environment variable is set, in which case it fails: CI must never skip
// these tests silently.
package redistest

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
)

// Binary is the name of the server executable looked up on PATH.
const Binary = "redis-server"

// How long Start waits for the server to answer PING, and Stop for it to
// exit after SIGTERM before killing it.
const (
	startTimeout = 10 * time.Second
	stopTimeout  = 5 * time.Second
)

// Server is one redis-server process owned by a test.
type Server struct {
	t    testing.TB
	bin  string
	dir  string
	port int

	// cluster is true for a one-node Redis Cluster owning every slot.
	cluster bool

	mu  sync.Mutex
	cmd *exec.Cmd
	// exited is closed when the running process has been reaped.
	exited chan struct{}
}

// Start launches a redis-server on a free 127.0.0.1 port and registers its
// shutdown with t.Cleanup. It skips the test when redis-server is missing
// and CI is unset, and fails it when CI is set.
func Start(t testing.TB) *Server {
	t.Helper()
	return start(t, false)
}

// StartCluster is Start for a one-node Redis Cluster that owns all 16384
// slots. It enforces what a real cluster does to one node's commands (every
// key of a command or script in one slot), so code that passes against it
// is slot-correct; use ClusterClient to talk to it.
func StartCluster(t testing.TB) *Server {
	t.Helper()
	return start(t, true)
}

func start(t testing.TB, cluster bool) *Server {
	t.Helper()
	bin, err := exec.LookPath(Binary)
	if err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("redistest: %s not found on PATH and CI is set: install it (apt-get install redis-server): %v", Binary, err)
		}
		t.Skipf("redistest: %s not found on PATH; install it (apt-get install redis-server) to run this test", Binary)
	}
	s := &Server{t: t, bin: bin, dir: t.TempDir(), cluster: cluster}
	// A free port can be taken by someone else between probing and
	// binding; try a few.
	var lastErr error
	for range 5 {
		port, err := freePort()
		if err != nil {
			t.Fatalf("redistest: find a free port: %v", err)
		}
		s.port = port
		if lastErr = s.launch(); lastErr == nil {
			t.Cleanup(s.Stop)
			return s
		}
	}
	t.Fatalf("redistest: start %s: %v", Binary, lastErr)
	return nil
}

// Addr returns the server's host:port.
func (s *Server) Addr() string { return net.JoinHostPort("127.0.0.1", strconv.Itoa(s.port)) }

// Port returns the server's TCP port; it stays the same across Restart.
func (s *Server) Port() int { return s.port }

// Client returns a new client for the server, closed when the test ends.
func (s *Server) Client() *redis.Client {
	c := redis.NewClient(&redis.Options{Addr: s.Addr()})
	s.t.Cleanup(func() { _ = c.Close() })
	return c
}

// ClusterClient returns a new cluster client for a server started with
// StartCluster, closed when the test ends.
func (s *Server) ClusterClient() *redis.ClusterClient {
	c := redis.NewClusterClient(&redis.ClusterOptions{Addrs: []string{s.Addr()}})
	s.t.Cleanup(func() { _ = c.Close() })
	return c
}

// Stop shuts the server down (SIGTERM, then SIGKILL after a bounded wait).
// Stopping a stopped server does nothing.
func (s *Server) Stop() {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.cmd == nil {
		return
	}
	_ = s.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-s.exited:
	case <-time.After(stopTimeout):
		_ = s.cmd.Process.Kill()
		<-s.exited
	}
	s.cmd = nil
}

// Restart starts the server again on the same port after Stop (it stops it
// first if it is running). Its data is gone: the server keeps nothing on
// disk, like a cache node that lost its memory.
func (s *Server) Restart() {
	s.t.Helper()
	s.Stop()
	// The port was ours a moment ago; it may linger briefly, so retry.
	deadline := time.Now().Add(startTimeout)
	for {
		err := s.launch()
		if err == nil {
			return
		}
		if time.Now().After(deadline) {
			s.t.Fatalf("redistest: restart on port %d: %v", s.port, err)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// launch starts the process on s.port and waits until it answers PING.
func (s *Server) launch() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	logPath := filepath.Join(s.dir, fmt.Sprintf("redis-%d.log", s.port))
	cmd := exec.Command(s.bin,
		"--port", strconv.Itoa(s.port),
		"--bind", "127.0.0.1",
		"--save", "",
		"--appendonly", "no",
		"--dir", s.dir,
		"--daemonize", "no",
		"--logfile", logPath,
	)
	if s.cluster {
		cmd.Args = append(cmd.Args, "--cluster-enabled", "yes",
			"--cluster-config-file", filepath.Join(s.dir, fmt.Sprintf("nodes-%d.conf", s.port)))
	}
	cmd.Dir = s.dir
	deadline := time.Now().Add(startTimeout)
	exited, err := startServer(cmd, s.port, logPath, deadline)
	if err != nil {
		return err
	}
	if s.cluster {
		if err := ownAllSlots(s.port, deadline); err != nil {
			_ = cmd.Process.Kill()
			<-exited
			return fmt.Errorf("cluster setup: %w: %s", err, tail(logPath))
		}
	}
	s.cmd, s.exited = cmd, exited
	return nil
}

// startServer starts the redis-server of cmd (tied to this process's life)
// and waits until it answers PING on port. It returns the channel closed
// when the process exits; on failure the process is gone.
func startServer(cmd *exec.Cmd, port int, logPath string, deadline time.Time) (chan struct{}, error) {
	dieWithParent(cmd)
	if err := cmd.Start(); err != nil {
		return nil, fmt.Errorf("exec %s: %w", cmd.Path, err)
	}
	exited := make(chan struct{})
	var waitErr error
	go func() {
		waitErr = cmd.Wait()
		close(exited)
	}()
	for {
		select {
		case <-exited:
			return nil, fmt.Errorf("server on port %d exited early (%v): %s", port, waitErr, tail(logPath))
		default:
		}
		if ping(port) == nil {
			return exited, nil
		}
		if time.Now().After(deadline) {
			_ = cmd.Process.Kill()
			<-exited
			return nil, fmt.Errorf("no PING answer on port %d within %v: %s", port, startTimeout, tail(logPath))
		}
		time.Sleep(10 * time.Millisecond)
	}
}

// ownAllSlots assigns every slot to the node (unless a restart kept them
// in its nodes file) and waits until the cluster state is ok.
func ownAllSlots(port int, deadline time.Time) error {
	c := redis.NewClient(&redis.Options{Addr: net.JoinHostPort("127.0.0.1", strconv.Itoa(port))})
	defer c.Close()
	ctx, cancel := context.WithDeadline(context.Background(), deadline)
	defer cancel()
	for {
		info, err := c.ClusterInfo(ctx).Result()
		if err != nil {
			return err
		}
		if strings.Contains(info, "cluster_state:ok") {
			return nil
		}
		if strings.Contains(info, "cluster_slots_assigned:0\r") {
			if err := c.Do(ctx, "CLUSTER", "ADDSLOTSRANGE", 0, 16383).Err(); err != nil {
				return err
			}
		}
		select {
		case <-ctx.Done():
			return fmt.Errorf("cluster state not ok: %s", info)
		case <-time.After(20 * time.Millisecond):
		}
	}
}

// ping sends one inline PING and checks for +PONG.
func ping(port int) error {
	conn, err := net.DialTimeout("tcp", net.JoinHostPort("127.0.0.1", strconv.Itoa(port)), 200*time.Millisecond)
	if err != nil {
		return err
	}
	defer conn.Close()
	_ = conn.SetDeadline(time.Now().Add(500 * time.Millisecond))
	if _, err := conn.Write([]byte("PING\r\n")); err != nil {
		return err
	}
	line, err := bufio.NewReader(conn).ReadString('\n')
	if err != nil {
		return err
	}
	if strings.TrimSpace(line) != "+PONG" {
		return errors.New("unexpected reply " + strconv.Quote(line))
	}
	return nil
}

// freePort asks the kernel for a free loopback port.
func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, err
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// tail returns the last lines of the server log, for error messages.
func tail(path string) string {
	b, err := os.ReadFile(path)
	if err != nil {
		return "(no log)"
	}
	lines := strings.Split(strings.TrimSpace(string(b)), "\n")
	if len(lines) > 5 {
		lines = lines[len(lines)-5:]
	}
	return strings.Join(lines, " | ")
}

// FlushAll empties the server, for tests that reuse one server.
func (s *Server) FlushAll(ctx context.Context) error {
	c := redis.NewClient(&redis.Options{Addr: s.Addr()})
	defer c.Close()
	return c.FlushAll(ctx).Err()
}
