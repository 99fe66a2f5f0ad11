package consumer

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"os/signal"
	"syscall"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
	"go.uber.org/zap"

	"ripen/state"
)

// Environment of a child process started by the child-process tests: the
// test binary re-executed runs one Service instead of the tests.
const (
	// childConfigEnv holds the child's Config as JSON; when it is set the
	// binary is a child.
	childConfigEnv = "RIPEN_TEST_CHILD_CONFIG"
	// childRedisEnv is the host:port of the redis-server.
	childRedisEnv = "RIPEN_TEST_CHILD_REDIS"
	// childLifetime bounds a child's life, so that none outlives its test
	// even if the parent dies without killing it.
	childLifetime = 3 * time.Minute
)

func TestMain(m *testing.M) {
	if cfg := os.Getenv(childConfigEnv); cfg != "" {
		os.Exit(childMain(cfg, os.Getenv(childRedisEnv)))
	}
	// The outage tests stop Redis on purpose; go-redis would log every
	// refused dial to stderr and bury the test output.
	redis.SetLogger(quietRedisLog{})
	os.Exit(m.Run())
}

// quietRedisLog drops go-redis's internal log lines in tests.
type quietRedisLog struct{}

func (quietRedisLog) Printf(context.Context, string, ...any) {}

// childMain runs a Service as `ripen run` does: until SIGTERM or SIGINT,
// then a graceful stop. It returns the process exit code: 0 after a
// graceful stop, 1 on any error.
func childMain(cfgJSON, redisAddr string) int {
	var cfg Config
	if err := json.Unmarshal([]byte(cfgJSON), &cfg); err != nil {
		fmt.Fprintln(os.Stderr, "child: config:", err)
		return 1
	}
	log, err := zap.NewDevelopment(zap.IncreaseLevel(zap.WarnLevel))
	if err != nil {
		fmt.Fprintln(os.Stderr, "child: logger:", err)
		return 1
	}
	rdb := redis.NewClient(&redis.Options{Addr: redisAddr})
	defer rdb.Close()
	store, err := state.New(rdb, state.Options{})
	if err != nil {
		log.Error("child: store", zap.Error(err))
		return 1
	}
	svc, err := New(cfg, Deps{Store: store, Logger: log})
	if err != nil {
		log.Error("child: service", zap.Error(err))
		return 1
	}
	ctx, stop := signal.NotifyContext(context.Background(), syscall.SIGTERM, os.Interrupt)
	defer stop()
	ctx, cancel := context.WithTimeout(ctx, childLifetime)
	defer cancel()
	if err := svc.Run(ctx); err != nil {
		log.Error("child: run", zap.Error(err))
		return 1
	}
	if ctx.Err() == context.DeadlineExceeded {
		log.Error("child: lifetime exceeded")
		return 1
	}
	return 0
}
