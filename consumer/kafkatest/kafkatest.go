// Package kafkatest runs an in-process Kafka-compatible cluster (kfake) on
// loopback for tests and for the `ripen devbroker` development command.
package kafkatest

import (
	"fmt"
	"net"
	"strconv"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kfake"
)

// DefaultTopics are the topics `ripen run` uses with its default
// configuration: clicks, conversions, allocations, dead letters, control.
var DefaultTopics = []string{"clicks", "conversions", "allocations", "ripen.deadletter", "ripen.control"}

// Options configures a cluster.
type Options struct {
	// Addr is the host:port to listen on. Default: 127.0.0.1 on a free port.
	Addr string
	// Partitions is the partition count of every seeded topic. Default: 3.
	Partitions int
	// Topics are created at start. Default: DefaultTopics.
	Topics []string
}

// New starts a single-broker cluster. Close it with Close.
func New(o Options) (*kfake.Cluster, error) {
	if o.Partitions == 0 {
		o.Partitions = 3
	}
	if o.Partitions < 0 {
		return nil, fmt.Errorf("kafkatest: partitions %d must be positive", o.Partitions)
	}
	if o.Topics == nil {
		o.Topics = DefaultTopics
	}
	opts := []kfake.Opt{
		kfake.NumBrokers(1),
		kfake.SeedTopics(int32(o.Partitions), o.Topics...),
		kfake.DefaultNumPartitions(o.Partitions),
		// Short group timeouts so that rebalances in tests take seconds.
		kfake.GroupMinSessionTimeout(100 * time.Millisecond),
	}
	if o.Addr != "" {
		host, portText, err := net.SplitHostPort(o.Addr)
		if err != nil {
			return nil, fmt.Errorf("kafkatest: address %q: %w", o.Addr, err)
		}
		port, err := strconv.Atoi(portText)
		if err != nil || port < 0 || port > 65535 {
			return nil, fmt.Errorf("kafkatest: address %q: bad port", o.Addr)
		}
		opts = append(opts, kfake.Ports(port), kfake.ListenFn(func(network, _ string) (net.Listener, error) {
			return net.Listen(network, net.JoinHostPort(host, strconv.Itoa(port)))
		}))
	}
	c, err := kfake.NewCluster(opts...)
	if err != nil {
		return nil, fmt.Errorf("kafkatest: start cluster: %w", err)
	}
	return c, nil
}

// Start starts a cluster on a free loopback port with the given partition
// count and topics (DefaultTopics when none) and closes it when the test
// ends. It returns the broker addresses.
func Start(t testing.TB, partitions int, topics ...string) []string {
	t.Helper()
	c, err := New(Options{Partitions: partitions, Topics: topics})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(c.Close)
	return c.ListenAddrs()
}
