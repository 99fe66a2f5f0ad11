package closedloop

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"net"
	"os"
	"os/exec"
	"strconv"
	"strings"
	"syscall"
	"time"

	"github.com/alicebob/miniredis/v2"
	"github.com/redis/go-redis/v9"
)

// Store kinds of StartStore.
const (
	// StoreAuto runs redis-server from PATH, else the embedded store.
	StoreAuto = "auto"
	// StoreServer runs redis-server from PATH.
	StoreServer = "redis-server"
	// StoreEmbedded runs an embedded Redis-compatible store (miniredis).
	StoreEmbedded = "embedded"
)

// RedisBinary is the Redis server looked up on PATH.
const RedisBinary = "redis-server"

// Store is a state store started for a run.
type Store struct {
	// Client talks to it.
	Client redis.UniversalClient
	// Name says what it is ("redis-server on 127.0.0.1:PORT").
	Name string
	stop func()
}

// Close stops the store and removes its files.
func (s *Store) Close() { s.stop() }

// StartStore starts a store of the given kind (StoreAuto, StoreServer or
// StoreEmbedded) on a free loopback port, without persistence.
func StartStore(ctx context.Context, kind string) (*Store, error) {
	switch kind {
	case StoreAuto, StoreServer:
		bin, err := exec.LookPath(RedisBinary)
		if err != nil {
			if kind == StoreServer {
				return nil, fmt.Errorf("closedloop: store %s: %w", kind, err)
			}
			return startEmbedded()
		}
		return startRedisServer(ctx, bin)
	case StoreEmbedded:
		return startEmbedded()
	}
	return nil, fmt.Errorf("closedloop: store %q: want %s, %s or %s", kind, StoreAuto, StoreServer, StoreEmbedded)
}

func startEmbedded() (*Store, error) {
	m, err := miniredis.Run()
	if err != nil {
		return nil, fmt.Errorf("closedloop: start embedded store: %w", err)
	}
	rdb := redis.NewClient(&redis.Options{Addr: m.Addr()})
	return &Store{Client: rdb, Name: "embedded (miniredis)", stop: func() { _ = rdb.Close(); m.Close() }}, nil
}

// startRedisServer runs bin on a free loopback port without persistence,
// in a temporary directory removed when it stops.
func startRedisServer(ctx context.Context, bin string) (*Store, error) {
	dir, err := os.MkdirTemp("", "ripen-demo-redis-")
	if err != nil {
		return nil, fmt.Errorf("closedloop: %w", err)
	}
	var lastErr error
	for range 3 { // the free port may be taken between probe and bind
		port, err := freePort()
		if err != nil {
			lastErr = err
			continue
		}
		var out bytes.Buffer
		cmd := exec.Command(bin, "--port", strconv.Itoa(port), "--bind", "127.0.0.1", "--save", "", "--appendonly", "no",
			"--dir", dir, "--daemonize", "no", "--loglevel", "warning")
		cmd.Stdout, cmd.Stderr = &out, &out
		if err := cmd.Start(); err != nil {
			lastErr = err
			continue
		}
		exited := make(chan struct{})
		go func() { _ = cmd.Wait(); close(exited) }()
		stop := func() {
			_ = cmd.Process.Signal(syscall.SIGTERM)
			select {
			case <-exited:
			case <-time.After(5 * time.Second):
				_ = cmd.Process.Kill()
				<-exited
			}
			_ = os.RemoveAll(dir)
		}
		addr := net.JoinHostPort("127.0.0.1", strconv.Itoa(port))
		rdb := redis.NewClient(&redis.Options{Addr: addr})
		if err := waitPing(ctx, rdb, exited); err != nil {
			_ = rdb.Close()
			stop()
			lastErr = fmt.Errorf("%w (output: %s)", err, strings.TrimSpace(out.String()))
			if dir, err = os.MkdirTemp("", "ripen-demo-redis-"); err != nil {
				return nil, fmt.Errorf("closedloop: %w", err)
			}
			continue
		}
		return &Store{Client: rdb, Name: "redis-server on " + addr, stop: func() { _ = rdb.Close(); stop() }}, nil
	}
	_ = os.RemoveAll(dir)
	return nil, fmt.Errorf("closedloop: start %s: %w", bin, lastErr)
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, err
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// waitPing waits until rdb answers PING, the process exits or 10s pass.
func waitPing(ctx context.Context, rdb *redis.Client, exited <-chan struct{}) error {
	deadline := time.Now().Add(10 * time.Second)
	for {
		err := rdb.Ping(ctx).Err()
		if err == nil {
			return nil
		}
		select {
		case <-exited:
			return errors.New("redis-server exited at start")
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(20 * time.Millisecond):
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("no answer to PING within 10s: %w", err)
		}
	}
}
