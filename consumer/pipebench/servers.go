package pipebench

import (
	"context"
	"errors"
	"fmt"
	"net"
	"os"
	"os/exec"
	"slices"
	"strconv"
	"strings"
	"syscall"
	"time"

	"github.com/redis/go-redis/v9"
)

// redisServer is a redis-server started for one bench run.
type redisServer struct {
	cmd  *exec.Cmd
	dir  string
	addr string
	done chan struct{}
}

// startRedis starts redis-server from PATH on a free loopback port,
// without persistence, in a temporary directory.
func startRedis(ctx context.Context) (*redisServer, error) {
	bin, err := exec.LookPath("redis-server")
	if err != nil {
		return nil, fmt.Errorf("bench needs redis-server on PATH (for example apt-get install redis-server): %w", err)
	}
	dir, err := os.MkdirTemp("", "ripen-bench-")
	if err != nil {
		return nil, fmt.Errorf("bench: %w", err)
	}
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		os.RemoveAll(dir)
		return nil, fmt.Errorf("bench: free port: %w", err)
	}
	port := l.Addr().(*net.TCPAddr).Port
	l.Close()
	rs := &redisServer{dir: dir, addr: net.JoinHostPort("127.0.0.1", strconv.Itoa(port)), done: make(chan struct{})}
	rs.cmd = exec.Command(bin, "--port", strconv.Itoa(port), "--bind", "127.0.0.1", "--save", "", "--appendonly", "no", "--dir", dir, "--daemonize", "no")
	var out strings.Builder
	rs.cmd.Stdout, rs.cmd.Stderr = &out, &out
	if err := rs.cmd.Start(); err != nil {
		os.RemoveAll(dir)
		return nil, fmt.Errorf("bench: start redis-server: %w", err)
	}
	go func() {
		_ = rs.cmd.Wait()
		close(rs.done)
	}()
	c := redis.NewClient(&redis.Options{Addr: rs.addr})
	defer c.Close()
	deadline := time.Now().Add(10 * time.Second)
	for c.Ping(ctx).Err() != nil {
		select {
		case <-rs.done:
			os.RemoveAll(dir)
			return nil, fmt.Errorf("bench: redis-server exited: %s", out.String())
		default:
		}
		if time.Now().After(deadline) {
			rs.stop()
			return nil, errors.New("bench: redis-server did not answer PING within 10s")
		}
		time.Sleep(20 * time.Millisecond)
	}
	return rs, nil
}

func (rs *redisServer) stop() {
	_ = rs.cmd.Process.Kill()
	<-rs.done
	os.RemoveAll(rs.dir)
}

// info returns the fields of one INFO section.
func info(ctx context.Context, rdb *redis.Client, section string) (map[string]string, error) {
	s, err := rdb.Info(ctx, section).Result()
	if err != nil {
		return nil, fmt.Errorf("bench: INFO %s: %w", section, err)
	}
	out := map[string]string{}
	for line := range strings.Lines(s) {
		if k, v, ok := strings.Cut(strings.TrimSpace(line), ":"); ok {
			out[k] = v
		}
	}
	return out, nil
}

// redisCPU returns the CPU seconds (user + system) the redis-server used
// so far, from INFO cpu.
func redisCPU(ctx context.Context, rdb *redis.Client) (float64, error) {
	m, err := info(ctx, rdb, "cpu")
	if err != nil {
		return 0, err
	}
	var sum float64
	for _, k := range []string{"used_cpu_user", "used_cpu_sys"} {
		f, err := strconv.ParseFloat(m[k], 64)
		if err != nil {
			return 0, fmt.Errorf("bench: INFO cpu %s: %q", k, m[k])
		}
		sum += f
	}
	return sum, nil
}

// usedMemory returns INFO memory's used_memory.
func usedMemory(ctx context.Context, rdb *redis.Client) (int64, error) {
	m, err := info(ctx, rdb, "memory")
	if err != nil {
		return 0, err
	}
	n, err := strconv.ParseInt(m["used_memory"], 10, 64)
	if err != nil {
		return 0, fmt.Errorf("bench: INFO memory used_memory: %q", m["used_memory"])
	}
	return n, nil
}

// commandStats returns INFO commandstats, busiest first (at most top).
func commandStats(ctx context.Context, rdb *redis.Client, top int) ([]CommandStat, error) {
	m, err := info(ctx, rdb, "commandstats")
	if err != nil {
		return nil, err
	}
	var out []CommandStat
	for k, v := range m {
		name, ok := strings.CutPrefix(k, "cmdstat_")
		if !ok {
			continue
		}
		c := CommandStat{Command: name}
		for _, kv := range strings.Split(v, ",") {
			f, x, _ := strings.Cut(kv, "=")
			switch f {
			case "calls":
				c.Calls, _ = strconv.ParseInt(x, 10, 64)
			case "usec":
				c.Usec, _ = strconv.ParseInt(x, 10, 64)
			case "usec_per_call":
				c.PerCall, _ = strconv.ParseFloat(x, 64)
			}
		}
		out = append(out, c)
	}
	slices.SortFunc(out, func(a, b CommandStat) int { return int(b.Usec - a.Usec) })
	return out[:min(top, len(out))], nil
}

// processCPU returns this process's CPU seconds (user + system).
func processCPU() float64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	tv := func(t syscall.Timeval) float64 { return float64(t.Sec) + float64(t.Usec)/1e6 }
	return tv(ru.Utime) + tv(ru.Stime)
}
