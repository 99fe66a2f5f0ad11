package consumer

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"os"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/segmentio/kafka-go"
	"github.com/segmentio/kafka-go/sasl"
	"github.com/segmentio/kafka-go/sasl/plain"
	"github.com/segmentio/kafka-go/sasl/scram"
)

// ClientID is the client id sent to the Kafka brokers.
const ClientID = "ripen"

// Dial timeouts of the Kafka clients.
const (
	kafkaDialTimeout = 10 * time.Second
	kafkaIdleTimeout = 30 * time.Second
)

// NewTLSConfig builds a client tls.Config from t, or returns nil when TLS is
// not enabled. Files are read now, so a bad path or PEM fails at start-up
// with the file named rather than at the first connection.
func NewTLSConfig(t TLSConfig) (*tls.Config, error) {
	if !t.Enabled {
		return nil, nil
	}
	c := &tls.Config{
		MinVersion:         tls.VersionTLS12,
		ServerName:         t.ServerName,
		InsecureSkipVerify: t.InsecureSkipVerify, //nolint:gosec // opt-in, documented as development only
	}
	if t.CAFile != "" {
		pem, err := os.ReadFile(t.CAFile)
		if err != nil {
			return nil, fmt.Errorf("tls ca_file: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("tls ca_file %s: no PEM certificate found", t.CAFile)
		}
		c.RootCAs = pool
	}
	switch {
	case t.CertFile != "" && t.KeyFile != "":
		cert, err := tls.LoadX509KeyPair(t.CertFile, t.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("tls cert_file %s / key_file %s: %w", t.CertFile, t.KeyFile, err)
		}
		c.Certificates = []tls.Certificate{cert}
	case t.CertFile != "" || t.KeyFile != "":
		return nil, errors.New("tls: cert_file and key_file must be given together")
	}
	return c, nil
}

// NewSASLMechanism returns the kafka-go SASL mechanism named by s, or nil
// when s.Mechanism is empty.
func NewSASLMechanism(s SASLConfig) (sasl.Mechanism, error) {
	switch s.Mechanism {
	case "":
		return nil, nil
	case SASLPlain:
		return plain.Mechanism{Username: s.Username, Password: s.Password}, nil
	case SASLScramSHA256, SASLScramSHA512:
		algo := scram.SHA256
		if s.Mechanism == SASLScramSHA512 {
			algo = scram.SHA512
		}
		m, err := scram.Mechanism(algo, s.Username, s.Password)
		if err != nil {
			return nil, fmt.Errorf("sasl %s: %w", s.Mechanism, err)
		}
		return m, nil
	}
	return nil, fmt.Errorf("sasl: unknown mechanism %q (valid: %s, %s, %s)", s.Mechanism, SASLPlain, SASLScramSHA256, SASLScramSHA512)
}

// kafkaSecurity builds k's TLS config and SASL mechanism, shared by the
// dialer and the transport.
func kafkaSecurity(k KafkaConfig) (*tls.Config, sasl.Mechanism, error) {
	tc, err := NewTLSConfig(k.TLS)
	if err != nil {
		return nil, nil, fmt.Errorf("kafka: %w", err)
	}
	mech, err := NewSASLMechanism(k.SASL)
	if err != nil {
		return nil, nil, fmt.Errorf("kafka: %w", err)
	}
	return tc, mech, nil
}

// KafkaDialer builds the dialer used by readers and the consumer group,
// with k's TLS and SASL settings.
func KafkaDialer(k KafkaConfig) (*kafka.Dialer, error) {
	tc, mech, err := kafkaSecurity(k)
	if err != nil {
		return nil, err
	}
	return &kafka.Dialer{
		ClientID:      ClientID,
		Timeout:       kafkaDialTimeout,
		DualStack:     true,
		TLS:           tc,
		SASLMechanism: mech,
	}, nil
}

// KafkaTransport builds the transport used by writers, with k's TLS and
// SASL settings.
func KafkaTransport(k KafkaConfig) (*kafka.Transport, error) {
	tc, mech, err := kafkaSecurity(k)
	if err != nil {
		return nil, err
	}
	return &kafka.Transport{
		ClientID:    ClientID,
		DialTimeout: kafkaDialTimeout,
		IdleTimeout: kafkaIdleTimeout,
		TLS:         tc,
		SASL:        mech,
	}, nil
}

// RedisOptions builds go-redis options from r: the URL (user, password,
// database, rediss:// TLS) and, when r.TLS is enabled, r's TLS settings,
// which replace the URL's. With r.Cluster set, it returns cluster options
// seeded with those addresses and the URL's credentials instead; exactly
// one of the two results is non-nil.
func RedisOptions(r RedisConfig) (*redis.Options, *redis.ClusterOptions, error) {
	opt, err := redis.ParseURL(r.URL)
	if err != nil {
		return nil, nil, fmt.Errorf("redis url: %w", redactURLError(err, r.URL))
	}
	if r.TLS.Enabled {
		tc, err := NewTLSConfig(r.TLS)
		if err != nil {
			return nil, nil, fmt.Errorf("redis: %w", err)
		}
		if tc.ServerName == "" && len(r.Cluster) == 0 && opt.TLSConfig != nil {
			tc.ServerName = opt.TLSConfig.ServerName
		}
		opt.TLSConfig = tc
	}
	if len(r.Cluster) == 0 {
		return opt, nil, nil
	}
	if opt.DB != 0 {
		return nil, nil, fmt.Errorf("redis: database %d selected but Redis Cluster only has database 0", opt.DB)
	}
	tc := opt.TLSConfig
	if tc != nil && !r.TLS.Enabled {
		// The URL's server name is one host; each cluster node is checked
		// against its own address instead.
		tc = tc.Clone()
		tc.ServerName = ""
	}
	return nil, &redis.ClusterOptions{
		Addrs:     append([]string(nil), r.Cluster...),
		Username:  opt.Username,
		Password:  opt.Password,
		TLSConfig: tc,
	}, nil
}

// NewRedisClient connects lazily to Redis as r says: a single server, or
// a Redis Cluster when r.Cluster is set. It does not contact the server.
func NewRedisClient(r RedisConfig) (redis.UniversalClient, error) {
	single, cluster, err := RedisOptions(r)
	if err != nil {
		return nil, err
	}
	if cluster != nil {
		return redis.NewClusterClient(cluster), nil
	}
	return redis.NewClient(single), nil
}
