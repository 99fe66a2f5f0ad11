//go:build linux

package consumer

import (
	"context"
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"reflect"
	"slices"
	"strings"
	"syscall"
	"testing"
	"time"

	"ripen/state"
)

// childProc is the test binary re-executed as one `ripen run`-like
// process (see TestMain), against the parent's kfake cluster and
// redis-server.
type childProc struct {
	cmd     *exec.Cmd
	done    chan struct{}
	logPath string
}

// startChild starts a child running a Service with cfg against env. It is
// killed when the test ends if still running.
func startChild(t *testing.T, env *testEnv, cfg Config) *childProc {
	t.Helper()
	b, err := json.Marshal(cfg)
	if err != nil {
		t.Fatal(err)
	}
	c := &childProc{done: make(chan struct{}), logPath: filepath.Join(t.TempDir(), "child.log")}
	f, err := os.Create(c.logPath)
	if err != nil {
		t.Fatal(err)
	}
	c.cmd = exec.Command(os.Args[0], "-test.run=^$")
	c.cmd.Env = append(os.Environ(), childConfigEnv+"="+string(b), childRedisEnv+"="+env.redis.Addr())
	c.cmd.Stdout, c.cmd.Stderr = f, f
	c.cmd.SysProcAttr = &syscall.SysProcAttr{Pdeathsig: syscall.SIGKILL}
	if err := c.cmd.Start(); err != nil {
		f.Close()
		t.Fatalf("start child: %v", err)
	}
	go func() {
		_ = c.cmd.Wait()
		f.Close()
		close(c.done)
	}()
	t.Cleanup(c.kill)
	return c
}

// kill sends SIGKILL and waits for the process to be reaped.
func (c *childProc) kill() {
	select {
	case <-c.done:
		return
	default:
	}
	_ = c.cmd.Process.Signal(syscall.SIGKILL)
	<-c.done
}

// exited reports whether the child has exited.
func (c *childProc) exited() bool {
	select {
	case <-c.done:
		return true
	default:
		return false
	}
}

// terminate sends SIGTERM and returns the exit code, failing the test if
// the child does not exit within timeout.
func (c *childProc) terminate(t *testing.T, timeout time.Duration) int {
	t.Helper()
	if err := c.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatalf("SIGTERM: %v", err)
	}
	select {
	case <-c.done:
	case <-time.After(timeout):
		c.kill()
		t.Fatalf("child did not exit within %v of SIGTERM; log:\n%s", timeout, c.log())
	}
	return c.cmd.ProcessState.ExitCode()
}

// log returns the child's output.
func (c *childProc) log() string {
	b, err := os.ReadFile(c.logPath)
	if err != nil {
		return "(no log: " + err.Error() + ")"
	}
	return string(b)
}

// inputTopics are the click and conversion topics with their partition
// counts.
func inputTopics(cfg Config, partitions int) map[string]int {
	return map[string]int{cfg.Kafka.ClickTopic: partitions, cfg.Kafka.ConversionTopic: partitions}
}

// waitProgress waits until the resume offsets in st add up to at least
// want messages, failing if the child exits meanwhile.
func waitProgress(t *testing.T, st *state.Store, topics map[string]int, want int64, c *childProc) {
	t.Helper()
	deadline := time.Now().Add(60 * time.Second)
	for {
		got := storeResumeTotal(t, st, topics)
		if got >= want {
			return
		}
		if c.exited() {
			t.Fatalf("child exited at %d of %d messages; log:\n%s", got, want, c.log())
		}
		if time.Now().After(deadline) {
			t.Fatalf("resume offsets at %d of %d messages after 60s; child log:\n%s", got, want, c.log())
		}
		time.Sleep(2 * time.Millisecond)
	}
}

// sameStates checks that two stores hold the same experiments, arms and
// arm states (advanced to asOf).
func sameStates(t *testing.T, got, want *state.Store, asOf int64) {
	t.Helper()
	ctx := context.Background()
	gi, err := got.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	wi, err := want.Experiments(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(gi, wi) {
		t.Fatalf("experiments %v, uninterrupted run %v", gi, wi)
	}
	for _, id := range gi {
		g, err := got.Load(ctx, id)
		if err != nil {
			t.Fatal(err)
		}
		w, err := want.Load(ctx, id)
		if err != nil {
			t.Fatal(err)
		}
		if !slices.Equal(g.Arms, w.Arms) {
			t.Fatalf("%s: arms %v, uninterrupted run %v", id, g.Arms, w.Arms)
		}
		for _, a := range g.Arms {
			gs, ws := g.States[a].Clone(), w.States[a].Clone()
			gs.Advance(asOf)
			ws.Advance(asOf)
			if !reflect.DeepEqual(gs.Snapshot(), ws.Snapshot()) {
				t.Errorf("%s/%s: state differs from the uninterrupted run: clicks %d conv %d, uninterrupted %d %d",
					id, a, gs.Clicks(), gs.Conversions(), ws.Clicks(), ws.Conversions())
			}
		}
	}
}

// TestCrashSIGKILLMatchesUninterrupted runs the service in a child process
// and kills it with SIGKILL twice while it consumes (once its resume
// offsets pass 30% and 70% of the stream; only the first with -short): no
// final flush, no commit, no group leave; each time a new child starts in
// the same group (and waits out the dead member's session). The
// final state must equal that of an uninterrupted run over the same
// topics (in-process, own key prefix and group) and the offline join.
func TestCrashSIGKILLMatchesUninterrupted(t *testing.T) {
	const partitions = 3
	env := newTestEnv(t, partitions)
	s := genStream(21, 3000, time.Hour)
	cfg := env.config("sigkill")
	cfg.Pipeline.FlushEvents = 100
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)
	total := int64(len(s.clicks) + len(s.convs))
	topics := inputTopics(cfg, partitions)

	refStore, err := state.New(env.redis.Client(), state.Options{Prefix: "uninterrupted"})
	if err != nil {
		t.Fatal(err)
	}
	ref := &testEnv{brokers: env.brokers, redis: env.redis, store: refStore}
	refCfg := cfg
	refCfg.Kafka.Group = "sigkill-uninterrupted"
	_, stopRef := ref.start(t, refCfg, testLogger(t), testHooks{}, nil)

	kills := []float64{0.3, 0.7}
	if testing.Short() {
		kills = kills[:1]
	}
	for _, frac := range kills {
		c := startChild(t, env, cfg)
		waitProgress(t, env.store, topics, int64(frac*float64(total)), c)
		c.kill()
		if got := storeResumeTotal(t, env.store, topics); got >= total {
			t.Logf("child consumed everything (%d) before the kill at %.0f%%", got, 100*frac)
		}
	}
	c := startChild(t, env, cfg)
	ref.waitConsumed(t, refCfg, 60*time.Second)
	env.finish(t, cfg, s)
	ref.waitConsumed(t, refCfg, 60*time.Second)
	if code := c.terminate(t, cfg.ShutdownTimeout+10*time.Second); code != 0 {
		t.Fatalf("last child exited with %d after SIGTERM; log:\n%s", code, c.log())
	}
	if err := stopRef(); err != nil {
		t.Fatalf("uninterrupted run: %v", err)
	}
	sameStates(t, env.store, refStore, s.asOf)
	checkAgainstOffline(t, env.store, s)
}

// TestSIGTERMChildGracefulExit sends SIGTERM to a child process running
// the service while it consumes (the batch in progress is partial: the
// flush interval is long) and checks that it exits 0 within the shutdown
// timeout, that the offsets it committed to Kafka equal the resume offsets
// in Redis, and that a restarted child completes the state exactly.
func TestSIGTERMChildGracefulExit(t *testing.T) {
	const partitions = 3
	env := newTestEnv(t, partitions)
	s := genStream(22, 3000, time.Hour)
	cfg := env.config("sigterm")
	cfg.Pipeline.FlushEvents = 100
	cfg.Pipeline.FlushInterval = 2 * time.Second
	env.produce(t, cfg.Kafka.ClickTopic, s.clicks)
	env.produce(t, cfg.Kafka.ConversionTopic, s.convs)
	total := int64(len(s.clicks) + len(s.convs))
	topics := inputTopics(cfg, partitions)

	c := startChild(t, env, cfg)
	waitProgress(t, env.store, topics, total/4, c)
	t0 := time.Now()
	code := c.terminate(t, cfg.ShutdownTimeout+10*time.Second)
	if code != 0 {
		t.Fatalf("child exited with %d after SIGTERM, want 0; log:\n%s", code, c.log())
	}
	if d := time.Since(t0); d > cfg.ShutdownTimeout {
		t.Errorf("child took %v to stop, shutdown timeout %v", d, cfg.ShutdownTimeout)
	}
	if strings.Contains(c.log(), "final flush on shutdown") {
		t.Errorf("final flush failed; log:\n%s", c.log())
	}
	checkCommittedEqualsResume(t, env, cfg, partitions)

	c = startChild(t, env, cfg)
	env.finish(t, cfg, s)
	if code := c.terminate(t, cfg.ShutdownTimeout+10*time.Second); code != 0 {
		t.Fatalf("second child exited with %d, want 0; log:\n%s", code, c.log())
	}
	checkCommittedEqualsResume(t, env, cfg, partitions)
	checkAgainstOffline(t, env.store, s)
}
