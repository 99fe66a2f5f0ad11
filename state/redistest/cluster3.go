package redistest

import (
	"context"
	"errors"
	"fmt"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
)

// CLIBinary is the name of the command-line client looked up on PATH; its
// `--cluster create` joins the nodes of a multi-node cluster. Debian ships
// it in the redis-server package (through redis-tools).
const CLIBinary = "redis-cli"

// ClusterSlots is the number of hash slots of a Redis Cluster.
const ClusterSlots = 16384

// minMasters is the smallest cluster `redis-cli --cluster create` accepts.
const minMasters = 3

// clusterTimeout bounds the creation of a multi-node cluster: the
// `--cluster create` call and the wait for every node to report a healthy
// cluster.
const clusterTimeout = 30 * time.Second

// Cluster is a Redis Cluster of masters without replicas, every node a
// redis-server process on 127.0.0.1 owned by a test, with the 16384 slots
// split between them by `redis-cli --cluster create`. Unlike StartCluster's
// one node, it spreads experiments over nodes, so MOVED redirections and
// per-node script caches are exercised too.
type Cluster struct {
	t     testing.TB
	nodes []*clusterNode
	once  sync.Once
}

// clusterNode is one master of a Cluster.
type clusterNode struct {
	port    int // client port
	busPort int // cluster bus port
	dir     string
	cmd     *exec.Cmd
	exited  chan struct{} // closed once the process was reaped
}

func (n *clusterNode) addr() string { return net.JoinHostPort("127.0.0.1", strconv.Itoa(n.port)) }

func (n *clusterNode) logPath() string {
	return filepath.Join(n.dir, fmt.Sprintf("redis-%d.log", n.port))
}

// StartCluster3 is StartClusterN(t, 3): the smallest multi-master cluster.
func StartCluster3(t testing.TB) *Cluster {
	t.Helper()
	return StartClusterN(t, 3)
}

// StartClusterN starts n (at least 3) cluster-enabled redis-server masters
// on free 127.0.0.1 ports, without persistence, joins them into one cluster
// with `redis-cli --cluster create ... --cluster-replicas 0`, and waits
// (at most 30 s) until every node reports cluster_state:ok with all 16384
// slots assigned and all n nodes known. The nodes are stopped when the
// test ends, and die with the test binary if it is killed. Like Start, it
// skips the test when redis-server or redis-cli is missing and CI is
// unset, and fails it when CI is set.
func StartClusterN(t testing.TB, n int) *Cluster {
	t.Helper()
	if n < minMasters {
		t.Fatalf("redistest: a cluster of %d masters: redis-cli creates at least %d (use StartCluster for one node)", n, minMasters)
	}
	bin := lookPathOrSkip(t, Binary)
	cli := lookPathOrSkip(t, CLIBinary)
	c := &Cluster{t: t}
	t.Cleanup(c.Stop)
	root := t.TempDir()
	for i := range n {
		dir := filepath.Join(root, fmt.Sprintf("node%d", i))
		if err := os.Mkdir(dir, 0o755); err != nil {
			t.Fatalf("redistest: node directory: %v", err)
		}
		node, err := startNode(bin, dir)
		if err != nil {
			t.Fatalf("redistest: start cluster node %d: %v", i, err)
		}
		c.nodes = append(c.nodes, node)
	}
	ctx, cancel := context.WithTimeout(context.Background(), clusterTimeout)
	defer cancel()
	args := []string{"--cluster", "create"}
	args = append(args, c.Addrs()...)
	args = append(args, "--cluster-replicas", "0", "--cluster-yes")
	cmd := exec.CommandContext(ctx, cli, args...)
	cmd.Env = append(os.Environ(), "NO_COLOR=1")
	dieWithParent(cmd)
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("redistest: %s --cluster create: %v: %s", CLIBinary, err, lastLines(string(out), 8))
	}
	if err := c.waitHealthy(ctx); err != nil {
		t.Fatalf("redistest: cluster of %d nodes: %v", n, err)
	}
	return c
}

// lookPathOrSkip finds name on PATH, or skips the test (CI unset) or fails
// it (CI set) as Start does.
func lookPathOrSkip(t testing.TB, name string) string {
	t.Helper()
	p, err := exec.LookPath(name)
	if err != nil {
		if os.Getenv("CI") != "" {
			t.Fatalf("redistest: %s not found on PATH and CI is set: install it (apt-get install redis-server): %v", name, err)
		}
		t.Skipf("redistest: %s not found on PATH; install it (apt-get install redis-server) to run this test", name)
	}
	return p
}

// startNode launches one cluster-enabled server in dir on a free client
// port and a free bus port (set explicitly, since the default, port+10000,
// may be taken or beyond 65535), retrying with other ports when the start
// fails, and waits until it answers PING.
func startNode(bin, dir string) (*clusterNode, error) {
	var lastErr error
	for range 5 {
		port, err := freePort()
		if err != nil {
			return nil, fmt.Errorf("find a free port: %w", err)
		}
		bus, err := freePort()
		if err != nil {
			return nil, fmt.Errorf("find a free bus port: %w", err)
		}
		if bus == port {
			continue
		}
		n := &clusterNode{port: port, busPort: bus, dir: dir}
		if lastErr = n.launch(bin); lastErr == nil {
			return n, nil
		}
	}
	return nil, lastErr
}

// launch starts the node's process and waits until it answers PING.
func (n *clusterNode) launch(bin string) error {
	cmd := exec.Command(bin,
		"--port", strconv.Itoa(n.port),
		"--bind", "127.0.0.1",
		"--cluster-enabled", "yes",
		"--cluster-port", strconv.Itoa(n.busPort),
		"--cluster-config-file", filepath.Join(n.dir, fmt.Sprintf("nodes-%d.conf", n.port)),
		"--save", "",
		"--appendonly", "no",
		"--dir", n.dir,
		"--daemonize", "no",
		"--logfile", n.logPath(),
	)
	cmd.Dir = n.dir
	exited, err := startServer(cmd, n.port, n.logPath(), time.Now().Add(startTimeout))
	if err != nil {
		return err
	}
	n.cmd, n.exited = cmd, exited
	return nil
}

// waitHealthy polls CLUSTER INFO on every node until each reports
// cluster_state:ok, every slot assigned and every node known, or ctx ends.
func (c *Cluster) waitHealthy(ctx context.Context) error {
	want := map[string]string{
		"cluster_state":          "ok",
		"cluster_slots_assigned": strconv.Itoa(ClusterSlots),
		"cluster_slots_ok":       strconv.Itoa(ClusterSlots),
		"cluster_known_nodes":    strconv.Itoa(len(c.nodes)),
		"cluster_size":           strconv.Itoa(len(c.nodes)),
	}
	clients := make([]*redis.Client, len(c.nodes))
	for i, n := range c.nodes {
		clients[i] = redis.NewClient(&redis.Options{Addr: n.addr()})
		defer clients[i].Close()
	}
	for {
		pending := ""
		for i, cl := range clients {
			info, err := cl.ClusterInfo(ctx).Result()
			if err != nil {
				pending = fmt.Sprintf("node %s: cluster info: %v", c.nodes[i].addr(), err)
				break
			}
			fields := parseInfo(info)
			for k, v := range want {
				if fields[k] != v {
					pending = fmt.Sprintf("node %s: %s is %q, want %q", c.nodes[i].addr(), k, fields[k], v)
					break
				}
			}
			if pending != "" {
				break
			}
		}
		if pending == "" {
			return nil
		}
		select {
		case <-ctx.Done():
			return fmt.Errorf("not healthy within %v: %s", clusterTimeout, pending)
		case <-time.After(20 * time.Millisecond):
		}
	}
}

// parseInfo splits a CLUSTER INFO (or INFO) reply into its fields.
func parseInfo(info string) map[string]string {
	out := map[string]string{}
	for line := range strings.SplitSeq(info, "\n") {
		k, v, ok := strings.Cut(strings.TrimSpace(line), ":")
		if ok {
			out[k] = v
		}
	}
	return out
}

// Addrs returns the host:port of every node, in start order; any of them
// seeds a cluster client.
func (c *Cluster) Addrs() []string {
	out := make([]string, len(c.nodes))
	for i, n := range c.nodes {
		out[i] = n.addr()
	}
	return out
}

// ClusterClient returns a new cluster client seeded with every node,
// closed when the test ends.
func (c *Cluster) ClusterClient() *redis.ClusterClient {
	cl := redis.NewClusterClient(&redis.ClusterOptions{Addrs: c.Addrs()})
	c.t.Cleanup(func() { _ = cl.Close() })
	return cl
}

// NodeClient returns a plain (non-cluster) client of the node at addr,
// one of Addrs, closed when the test ends. It answers only for keys of the
// node's own slots (others get a MOVED error), which lets a test see where
// a key really lives.
func (c *Cluster) NodeClient(addr string) *redis.Client {
	c.t.Helper()
	if !slices.Contains(c.Addrs(), addr) {
		c.t.Fatalf("redistest: %s is not a node of the cluster %v", addr, c.Addrs())
	}
	cl := redis.NewClient(&redis.Options{Addr: addr})
	c.t.Cleanup(func() { _ = cl.Close() })
	return cl
}

// MasterOf returns the address of the master that serves key, as the
// cluster itself says: the key's slot from CLUSTER KEYSLOT and the slot's
// owner from CLUSTER SLOTS, both asked of the first node.
func (c *Cluster) MasterOf(ctx context.Context, key string) (string, error) {
	cl := redis.NewClient(&redis.Options{Addr: c.nodes[0].addr()})
	defer cl.Close()
	slot, err := cl.ClusterKeySlot(ctx, key).Result()
	if err != nil {
		return "", fmt.Errorf("cluster keyslot %q: %w", key, err)
	}
	ranges, err := cl.ClusterSlots(ctx).Result()
	if err != nil {
		return "", fmt.Errorf("cluster slots: %w", err)
	}
	for _, r := range ranges {
		if int64(r.Start) <= slot && slot <= int64(r.End) && len(r.Nodes) > 0 {
			return r.Nodes[0].Addr, nil
		}
	}
	return "", fmt.Errorf("slot %d of %q: %w", slot, key, errNoOwner)
}

var errNoOwner = errors.New("no node owns the slot")

// Stop shuts every node down (SIGTERM, then SIGKILL after a bounded wait).
// It runs at the end of the test; calling it earlier stops the cluster for
// good.
func (c *Cluster) Stop() {
	c.once.Do(func() {
		for _, n := range c.nodes {
			_ = n.cmd.Process.Signal(syscall.SIGTERM)
		}
		deadline := time.Now().Add(stopTimeout)
		for _, n := range c.nodes {
			select {
			case <-n.exited:
			case <-time.After(time.Until(deadline)):
				_ = n.cmd.Process.Kill()
				<-n.exited
			}
		}
	})
}

// lastLines returns the last k lines of s, joined, for error messages.
func lastLines(s string, k int) string {
	lines := strings.Split(strings.TrimSpace(s), "\n")
	if len(lines) > k {
		lines = lines[len(lines)-k:]
	}
	return strings.Join(lines, " | ")
}
