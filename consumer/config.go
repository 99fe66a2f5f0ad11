package consumer

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"maps"
	"net"
	"slices"
	"strconv"
	"strings"
	"time"
	"unicode"
	"unicode/utf8"

	"github.com/redis/go-redis/v9"

	"ripen/estimator"
)

// Config is the whole configuration of `ripen run`. It is loaded from a
// YAML file, then environment variables (RIPEN_*), then flags, each layer
// overriding the one before; zero fields take the defaults documented here
// (see WithDefaults). Control messages received at run time form one more
// layer on top of the per-experiment overrides (see ApplyControl).
type Config struct {
	// Kafka is how to reach the event bus.
	Kafka KafkaConfig `yaml:"kafka"`
	// Redis is how to reach the state store.
	Redis RedisConfig `yaml:"redis"`
	// HTTP is the listen address of /metrics, /livez, /readyz, /v1 and
	// the web console. Default: 127.0.0.1:9464.
	HTTP string `yaml:"http"`
	// HTTPAuth protects the web console and /v1.
	HTTPAuth HTTPAuthConfig `yaml:"http_auth"`
	// Log is the log encoding: "json" or "console". Default: json.
	Log string `yaml:"log"`
	// Pipeline tunes batching, the watermark and refits.
	Pipeline PipelineConfig `yaml:"pipeline"`
	// Defaults apply to every experiment discovered from clicks.
	Defaults ExperimentConfig `yaml:"defaults"`
	// Experiments override Defaults per experiment id.
	Experiments map[string]ExperimentConfig `yaml:"experiments,omitempty"`
	// Limits protect Redis from cardinality explosions.
	Limits LimitsConfig `yaml:"limits"`
	// ShutdownTimeout bounds the graceful stop after SIGTERM (stop fetching,
	// flush, commit, publish). Default: 20s.
	ShutdownTimeout time.Duration `yaml:"shutdown_timeout"`

	// Control holds the latest control message per experiment id, applied
	// on top of Experiments. It is never read from a file, the environment
	// or flags; ApplyControl maintains it. Default: empty.
	Control map[string]ControlMessage `yaml:"-"`
}

// KafkaConfig names the brokers, the consumer group and the topics.
type KafkaConfig struct {
	// Brokers are host:port seed addresses. Default: 127.0.0.1:9092.
	Brokers []string `yaml:"brokers"`
	// Group is the consumer group id. Default: ripen.
	Group string `yaml:"group"`
	// Topics. Defaults: clicks, conversions, allocations, ripen.deadletter, ripen.control.
	ClickTopic      string `yaml:"click_topic"`
	ConversionTopic string `yaml:"conversion_topic"`
	AllocationTopic string `yaml:"allocation_topic"`
	DeadLetterTopic string `yaml:"deadletter_topic"`
	ControlTopic    string `yaml:"control_topic"`
	// TLS enables TLS to the brokers.
	TLS TLSConfig `yaml:"tls"`
	// SASL enables SASL authentication.
	SASL SASLConfig `yaml:"sasl"`
}

// TLSConfig is a client TLS setup shared by Kafka and Redis.
type TLSConfig struct {
	// Enabled turns TLS on. Default: false.
	Enabled bool `yaml:"enabled"`
	// CAFile is a PEM bundle of trusted CAs. Default: the system pool.
	CAFile string `yaml:"ca_file"`
	// CertFile and KeyFile are a PEM client certificate and key (mutual TLS).
	// Default: none (both or neither must be set).
	CertFile string `yaml:"cert_file"`
	KeyFile  string `yaml:"key_file"`
	// ServerName overrides the name checked in the server certificate.
	// Default: the host of the address dialled.
	ServerName string `yaml:"server_name"`
	// InsecureSkipVerify disables certificate checks (development only).
	// Default: false.
	InsecureSkipVerify bool `yaml:"insecure_skip_verify"`
}

// SASL mechanism names accepted in SASLConfig.Mechanism.
const (
	SASLPlain       = "plain"
	SASLScramSHA256 = "scram-sha-256"
	SASLScramSHA512 = "scram-sha-512"
)

// SASLConfig is Kafka SASL authentication.
type SASLConfig struct {
	// Mechanism is "", "plain", "scram-sha-256" or "scram-sha-512". Default: "" (none).
	Mechanism string `yaml:"mechanism"`
	// Username is required when Mechanism is set.
	Username string `yaml:"username"`
	// Password; prefer the RIPEN_KAFKA_SASL_PASSWORD environment variable.
	Password string `yaml:"password"`
}

// RedisConfig is how to reach the state store.
type RedisConfig struct {
	// URL is redis://[user:password@]host:port/db or rediss:// for TLS.
	// Default: redis://127.0.0.1:6379/0.
	URL string `yaml:"url"`
	// Cluster lists seed addresses of a Redis Cluster; when set, URL's host
	// is ignored and its credentials and TLS still apply (its db must be 0).
	// Default: none (a single server).
	Cluster []string `yaml:"cluster,omitempty"`
	// Prefix starts every key. It must not contain '{' or '}', which would
	// break the hash tags of the key layout. Default: ripen.
	Prefix string `yaml:"prefix"`
	// TLS for Redis (also enabled by a rediss:// URL).
	TLS TLSConfig `yaml:"tls"`
}

// PipelineConfig tunes batching, the watermark and refits.
type PipelineConfig struct {
	// FlushEvents flushes a batch after this many events. Default: 5000.
	FlushEvents int `yaml:"flush_events"`
	// FlushInterval flushes a batch after this much wall time even if it
	// is not full (batching only; statistics never read the wall clock).
	// Default: 500ms.
	FlushInterval time.Duration `yaml:"flush_interval"`
	// Lateness is subtracted from the minimum over partitions of the latest
	// event time seen to give the watermark. Default: 2m.
	Lateness time.Duration `yaml:"lateness"`
	// RefitEvery is the refit tick in event time. Default: 15m.
	RefitEvery time.Duration `yaml:"refit_every"`
	// PublishThreshold publishes when any weight moved more than this since
	// the last publication. Range (0, 1]. Default: 0.01.
	PublishThreshold float64 `yaml:"publish_threshold"`
	// PublishEvery publishes at least this often in event time even if
	// weights did not move; at least RefitEvery, since publication happens
	// on refit ticks. Default: 1h.
	PublishEvery time.Duration `yaml:"publish_every"`
	// OrphanTTL is how long, in event time, a conversion waits for its
	// click before it is dead-lettered. Default: 1h.
	OrphanTTL time.Duration `yaml:"orphan_ttl"`
	// IdleTimeout is how long (wall clock) a partition that is caught up
	// with its log end may go without a new event before it stops holding
	// the group's watermark back, until it gets an event again. It only
	// keeps a live consumer moving when some partitions are quiet; a
	// partition that lags is never idle, so replays are unaffected.
	// Default: 1m.
	IdleTimeout time.Duration `yaml:"idle_timeout"`
	// HoldbackCap bounds the events an instance has read but not applied
	// (in flight or held back until the next refit tick, see Service):
	// each owned partition's reader pauses while its share (the cap over
	// the partitions owned) is out, which never stalls the group because
	// such a partition has applied everything up to the boundary. Should
	// the cap be exceeded all the same, every held event is applied at
	// once (bounded memory beats determinism; the refit of that tick may
	// then see events after it) and a warning is logged. Default: 200000.
	HoldbackCap int `yaml:"holdback_cap"`
	// ResetFencing raises this consumer group's writer epoch above every
	// generation recorded in Redis when the service starts (the
	// `ripen run --reset-fencing` flag; never read from a file or the
	// environment, since it is a one-off repair). Use it once, after the
	// Kafka consumer group was deleted or recreated: its generation ids
	// restarted, so every write is refused as coming from an older
	// generation. Risk: a consumer of the old group that is still running,
	// or another deployment writing the same Redis prefix, is no longer
	// fenced off and its writes could count events twice; stop every other
	// writer first. Default: false.
	ResetFencing bool `yaml:"-"`
}

// ExperimentConfig is the per-experiment model and policy setup. Pointer
// and zero fields inherit from Defaults.
type ExperimentConfig struct {
	// Window is the attribution window, more than 1m and a whole number of
	// milliseconds. Default: 7d.
	Window time.Duration `yaml:"window"`
	// Policy is one of estimator.PolicyNames(). Default: thompson-bayes.
	Policy string `yaml:"policy"`
	// Delay is auto, exponential, weibull or histogram (DelayNames).
	// Default: auto.
	Delay string `yaml:"delay"`
	// Floor and Cap bound each arm's weight, in [0, 1] with Floor <= Cap
	// and Cap > 0. Defaults: estimator's (0.01 and 1).
	Floor *float64 `yaml:"floor"`
	Cap   *float64 `yaml:"cap"`
	// MaxChange bounds the change of any weight per update, in [0, 1]; 0
	// disables the bound. Default: estimator's (0.10).
	MaxChange *float64 `yaml:"max_change"`
	// BurnInClicks and BurnInConversions: uniform until every arm has this
	// many. Defaults: estimator's (100 and 5).
	BurnInClicks      *int `yaml:"burn_in_clicks"`
	BurnInConversions *int `yaml:"burn_in_conversions"`
	// SettleProbability and SettleLoss configure the settle rule (see
	// estimator.Settle): it names an arm worse than the best by more than
	// SettleLoss (relative, in [0, 1)) with probability at most
	// 1 - SettleProbability (in (0, 1)), however often it is checked.
	// Defaults: estimator's (0.95 and 0.01).
	SettleProbability *float64 `yaml:"settle_probability"`
	SettleLoss        *float64 `yaml:"settle_loss"`
	// Paused arms receive no traffic. A nil list inherits; an empty list
	// (`paused: []`) pauses nothing. Default: none.
	Paused []string `yaml:"paused"`
	// Ended experiments keep their state but are no longer refitted or
	// published; their events are still counted. An override can end an
	// experiment but not revive one ended in Defaults; a control message
	// can do both. Default: false.
	Ended bool `yaml:"ended"`
	// Attribution says how conversions find their click: "indexed" (the
	// clicks are kept in the click index in Redis and each conversion is
	// joined by click id) or "carried" (conversions carry experiment, arm
	// and click_ts; clicks are not indexed, a conversion is counted from
	// its own fields, and one that lacks them is dead-lettered as
	// missing_attribution). Set per deployment in defaults and per
	// experiment under experiments; control messages cannot change it.
	// Default: indexed.
	Attribution string `yaml:"attribution"`
}

// Attribution modes of ExperimentConfig.Attribution.
const (
	AttributionIndexed = "indexed"
	AttributionCarried = "carried"
)

// MarshalYAML writes only the fields that are set, so that the written
// form reads back to the same settings: in particular a nil Paused
// (inherit) is left out while an empty one is written as [].
func (e ExperimentConfig) MarshalYAML() (any, error) {
	type setFields struct {
		Window            time.Duration `yaml:"window,omitempty"`
		Policy            string        `yaml:"policy,omitempty"`
		Delay             string        `yaml:"delay,omitempty"`
		Floor             *float64      `yaml:"floor,omitempty"`
		Cap               *float64      `yaml:"cap,omitempty"`
		MaxChange         *float64      `yaml:"max_change,omitempty"`
		BurnInClicks      *int          `yaml:"burn_in_clicks,omitempty"`
		BurnInConversions *int          `yaml:"burn_in_conversions,omitempty"`
		SettleProbability *float64      `yaml:"settle_probability,omitempty"`
		SettleLoss        *float64      `yaml:"settle_loss,omitempty"`
		Paused            *[]string     `yaml:"paused,omitempty"`
		Ended             bool          `yaml:"ended,omitempty"`
		Attribution       string        `yaml:"attribution,omitempty"`
	}
	out := setFields{
		Window: e.Window, Policy: e.Policy, Delay: e.Delay,
		Floor: e.Floor, Cap: e.Cap, MaxChange: e.MaxChange,
		BurnInClicks: e.BurnInClicks, BurnInConversions: e.BurnInConversions,
		SettleProbability: e.SettleProbability, SettleLoss: e.SettleLoss,
		Ended: e.Ended, Attribution: e.Attribution,
	}
	if e.Paused != nil {
		out.Paused = &e.Paused
	}
	return out, nil
}

// HTTPAuthConfig is the credential that protects the web console and /v1
// (never /metrics, /livez or /readyz, which scrapers and probes read).
// With none set they are open, which Validate accepts only on a loopback
// address unless AllowUnauthenticated says so.
type HTTPAuthConfig struct {
	// BearerToken is accepted as "Authorization: Bearer TOKEN", and, for
	// browsers, as the password of HTTP basic auth with any user name.
	// Prefer the RIPEN_HTTP_AUTH_BEARER_TOKEN environment variable.
	// Default: none.
	BearerToken string `yaml:"bearer_token"`
	// Username and Password are an HTTP basic-auth credential (both or
	// neither). Prefer RIPEN_HTTP_AUTH_PASSWORD for the password.
	// Default: none.
	Username string `yaml:"username"`
	Password string `yaml:"password"`
	// AllowUnauthenticated serves the console and /v1 without a
	// credential on an address beyond loopback (behind an authenticating
	// proxy, say). Default: false.
	AllowUnauthenticated bool `yaml:"allow_unauthenticated"`
}

// Enabled reports whether a credential is configured.
func (a HTTPAuthConfig) Enabled() bool {
	return a.BearerToken != "" || a.Username != "" || a.Password != ""
}

// LimitsConfig caps cardinality; excess events are dead-lettered with
// reason cap_exceeded.
type LimitsConfig struct {
	// MaxExperiments caps distinct experiments (and control overrides).
	// Default: 1000.
	MaxExperiments int `yaml:"max_experiments"`
	// MaxArms caps arms per experiment (and paused arms per override).
	// Default: 32.
	MaxArms int `yaml:"max_arms"`
	// MaxOrphansPerPartition caps parked conversions per partition. Default: 100000.
	MaxOrphansPerPartition int `yaml:"max_orphans_per_partition"`
}

// Defaults of Config, applied by WithDefaults to zero fields. Experiment
// defaults not listed here come from the estimator package
// (estimator.DefaultWindow, estimator.DefaultPolicy,
// estimator.DefaultAllocationOptions).
const (
	DefaultHTTP                   = "127.0.0.1:9464"
	DefaultLog                    = LogJSON
	DefaultBroker                 = "127.0.0.1:9092"
	DefaultGroup                  = "ripen"
	DefaultClickTopic             = "clicks"
	DefaultConversionTopic        = "conversions"
	DefaultAllocationTopic        = "allocations"
	DefaultDeadLetterTopic        = "ripen.deadletter"
	DefaultControlTopic           = "ripen.control"
	DefaultRedisURL               = "redis://127.0.0.1:6379/0"
	DefaultPrefix                 = "ripen"
	DefaultFlushEvents            = 5000
	DefaultFlushInterval          = 500 * time.Millisecond
	DefaultLateness               = 2 * time.Minute
	DefaultRefitEvery             = 15 * time.Minute
	DefaultPublishThreshold       = 0.01
	DefaultPublishEvery           = time.Hour
	DefaultOrphanTTL              = time.Hour
	DefaultIdleTimeout            = time.Minute
	DefaultHoldbackCap            = 200000
	DefaultMaxExperiments         = 1000
	DefaultMaxArms                = 32
	DefaultMaxOrphansPerPartition = 100000
	DefaultShutdownTimeout        = 20 * time.Second
	DefaultDelay                  = "auto"
)

// Log encodings accepted in Config.Log and by NewLogger.
const (
	LogJSON    = "json"
	LogConsole = "console"
)

// MinWindow is the exclusive lower bound of an attribution window.
const MinWindow = time.Minute

// ReasonBadControl: a control-topic message that cannot be decoded or
// whose settings are invalid; the message is ignored and dead-lettered.
const ReasonBadControl Reason = "bad_control"

// DelayNames lists the valid ExperimentConfig.Delay values in a fixed order.
func DelayNames() []string {
	return []string{
		estimator.FamilyAuto.String(), estimator.FamilyExponential.String(),
		estimator.FamilyWeibull.String(), estimator.FamilyHistogram.String(),
	}
}

// WithDefaults returns c with every zero field set to its documented
// default. Experiments and Control are left as they are: their zero fields
// inherit from Defaults in ExperimentFor.
func (c Config) WithDefaults() Config {
	k := &c.Kafka
	if len(k.Brokers) == 0 {
		k.Brokers = []string{DefaultBroker}
	}
	setDefault(&k.Group, DefaultGroup)
	setDefault(&k.ClickTopic, DefaultClickTopic)
	setDefault(&k.ConversionTopic, DefaultConversionTopic)
	setDefault(&k.AllocationTopic, DefaultAllocationTopic)
	setDefault(&k.DeadLetterTopic, DefaultDeadLetterTopic)
	setDefault(&k.ControlTopic, DefaultControlTopic)
	setDefault(&c.Redis.URL, DefaultRedisURL)
	setDefault(&c.Redis.Prefix, DefaultPrefix)
	setDefault(&c.HTTP, DefaultHTTP)
	setDefault(&c.Log, DefaultLog)
	p := &c.Pipeline
	setDefault(&p.FlushEvents, DefaultFlushEvents)
	setDefault(&p.FlushInterval, DefaultFlushInterval)
	setDefault(&p.Lateness, DefaultLateness)
	setDefault(&p.RefitEvery, DefaultRefitEvery)
	setDefault(&p.PublishThreshold, DefaultPublishThreshold)
	setDefault(&p.PublishEvery, DefaultPublishEvery)
	setDefault(&p.OrphanTTL, DefaultOrphanTTL)
	setDefault(&p.IdleTimeout, DefaultIdleTimeout)
	setDefault(&p.HoldbackCap, DefaultHoldbackCap)
	setDefault(&c.Limits.MaxExperiments, DefaultMaxExperiments)
	setDefault(&c.Limits.MaxArms, DefaultMaxArms)
	setDefault(&c.Limits.MaxOrphansPerPartition, DefaultMaxOrphansPerPartition)
	setDefault(&c.ShutdownTimeout, DefaultShutdownTimeout)
	c.Defaults = c.Defaults.WithDefaults()
	return c
}

// WithDefaults returns e with every zero or nil field set to the built-in
// experiment default (see the field docs); Paused stays nil when unset.
func (e ExperimentConfig) WithDefaults() ExperimentConfig {
	a := estimator.DefaultAllocationOptions()
	setDefault(&e.Window, estimator.DefaultWindow)
	setDefault(&e.Policy, estimator.DefaultPolicy)
	setDefault(&e.Delay, DefaultDelay)
	setDefault(&e.Attribution, AttributionIndexed)
	setDefaultPtr(&e.Floor, a.Floor)
	setDefaultPtr(&e.Cap, a.Cap)
	setDefaultPtr(&e.MaxChange, a.MaxChange)
	setDefaultPtr(&e.BurnInClicks, int(a.BurnInClicks))
	setDefaultPtr(&e.BurnInConversions, int(a.BurnInConversions))
	setDefaultPtr(&e.SettleProbability, a.SettleConfidence)
	setDefaultPtr(&e.SettleLoss, a.SettleTolerance)
	return e
}

func setDefault[T comparable](p *T, def T) {
	var zero T
	if *p == zero {
		*p = def
	}
}

func setDefaultPtr[T any](p **T, def T) {
	if *p == nil {
		*p = &def
	}
}

// overlay returns base with every set field of o (non-zero, non-nil)
// replacing base's; Ended is or-ed.
func (base ExperimentConfig) overlay(o ExperimentConfig) ExperimentConfig {
	if o.Window != 0 {
		base.Window = o.Window
	}
	if o.Policy != "" {
		base.Policy = o.Policy
	}
	if o.Delay != "" {
		base.Delay = o.Delay
	}
	if o.Attribution != "" {
		base.Attribution = o.Attribution
	}
	overlayPtr(&base.Floor, o.Floor)
	overlayPtr(&base.Cap, o.Cap)
	overlayPtr(&base.MaxChange, o.MaxChange)
	overlayPtr(&base.BurnInClicks, o.BurnInClicks)
	overlayPtr(&base.BurnInConversions, o.BurnInConversions)
	overlayPtr(&base.SettleProbability, o.SettleProbability)
	overlayPtr(&base.SettleLoss, o.SettleLoss)
	if o.Paused != nil {
		base.Paused = slices.Clone(o.Paused)
	}
	base.Ended = base.Ended || o.Ended
	return base
}

func overlayPtr[T any](dst **T, src *T) {
	if src != nil {
		v := *src
		*dst = &v
	}
}

// ExperimentFor returns the effective settings of experiment id: the
// built-in defaults, then c.Defaults, then c.Experiments[id], then
// c.Control[id]. Every pointer field of the result is non-nil and points
// to a fresh copy, so callers may keep it.
func (c Config) ExperimentFor(id string) ExperimentConfig {
	e := ExperimentConfig{}.overlay(c.Defaults).WithDefaults()
	if o, ok := c.Experiments[id]; ok {
		e = e.overlay(o)
	}
	if m, ok := c.Control[id]; ok {
		e = m.applyTo(e)
	}
	return e
}

// carried reports whether experiment id's conversions carry their
// attribution (see ExperimentConfig.Attribution).
func (c Config) carried(id string) bool {
	return c.ExperimentFor(id).Attribution == AttributionCarried
}

// indexes reports whether any experiment may use the click index: the
// default attribution or an experiment's is indexed.
func (c Config) indexes() bool {
	if c.Defaults.WithDefaults().Attribution == AttributionIndexed {
		return true
	}
	for _, e := range c.Experiments {
		if e.Attribution == AttributionIndexed {
			return true
		}
	}
	return false
}

// longestWindow is the longest attribution window the configuration
// names (defaults and per-experiment settings): the click index's horizon.
func (c Config) longestWindow() time.Duration {
	w := c.Defaults.WithDefaults().Window
	for _, e := range c.Experiments {
		w = max(w, e.Window)
	}
	for _, m := range c.Control {
		if d, err := estimator.ParseDuration(m.Window); err == nil {
			w = max(w, d)
		}
	}
	return w
}

// Validate reports every problem of c, which should have been through
// WithDefaults, as one error joining one line per problem; each line starts
// with the YAML path of the offending setting.
func (c Config) Validate() error {
	var v validator
	k := c.Kafka
	if len(k.Brokers) == 0 {
		v.add("kafka.brokers", "at least one broker address is required")
	}
	for i, b := range k.Brokers {
		if err := checkHostPort(b); err != nil {
			v.add(fmt.Sprintf("kafka.brokers[%d]", i), "%v", err)
		}
	}
	if k.Group == "" {
		v.add("kafka.group", "must not be empty")
	}
	topics := []struct{ key, name string }{
		{"kafka.click_topic", k.ClickTopic},
		{"kafka.conversion_topic", k.ConversionTopic},
		{"kafka.allocation_topic", k.AllocationTopic},
		{"kafka.deadletter_topic", k.DeadLetterTopic},
		{"kafka.control_topic", k.ControlTopic},
	}
	seen := map[string]string{}
	for _, t := range topics {
		if err := checkTopic(t.name); err != nil {
			v.add(t.key, "%v", err)
			continue
		}
		if prev, dup := seen[t.name]; dup {
			v.add(t.key, "topic %q is also %s; every topic must be distinct", t.name, prev)
		}
		seen[t.name] = t.key
	}
	v.tls("kafka.tls", k.TLS)
	switch k.SASL.Mechanism {
	case "":
		if k.SASL.Username != "" || k.SASL.Password != "" {
			v.add("kafka.sasl.mechanism", "username or password given without a mechanism (%s, %s or %s)", SASLPlain, SASLScramSHA256, SASLScramSHA512)
		}
	case SASLPlain, SASLScramSHA256, SASLScramSHA512:
		if k.SASL.Username == "" {
			v.add("kafka.sasl.username", "required by mechanism %s", k.SASL.Mechanism)
		}
		if k.SASL.Password == "" {
			v.add("kafka.sasl.password", "required by mechanism %s (set RIPEN_KAFKA_SASL_PASSWORD)", k.SASL.Mechanism)
		}
	default:
		v.add("kafka.sasl.mechanism", "unknown mechanism %q (valid: %s, %s, %s)", k.SASL.Mechanism, SASLPlain, SASLScramSHA256, SASLScramSHA512)
	}

	r := c.Redis
	if opt, err := redis.ParseURL(r.URL); err != nil {
		v.add("redis.url", "%v", redactURLError(err, r.URL))
	} else if len(r.Cluster) > 0 && opt.DB != 0 {
		v.add("redis.url", "database %d selected but Redis Cluster only has database 0", opt.DB)
	}
	for i, a := range r.Cluster {
		if err := checkHostPort(a); err != nil {
			v.add(fmt.Sprintf("redis.cluster[%d]", i), "%v", err)
		}
	}
	switch {
	case r.Prefix == "":
		v.add("redis.prefix", "must not be empty")
	case strings.ContainsAny(r.Prefix, "{}"):
		v.add("redis.prefix", "%q must not contain '{' or '}' (they delimit hash tags)", r.Prefix)
	case strings.ContainsFunc(r.Prefix, func(r rune) bool { return unicode.IsSpace(r) || unicode.IsControl(r) }):
		v.add("redis.prefix", "%q must not contain spaces or control characters", r.Prefix)
	}
	v.tls("redis.tls", r.TLS)

	if err := checkHostPort(c.HTTP); err != nil {
		v.add("http", "%v", err)
	} else if a := c.HTTPAuth; !a.Enabled() && !a.AllowUnauthenticated && !IsLoopback(c.HTTP) {
		v.add("http_auth", "%s listens beyond loopback and the console and /v1 have no credential: set http_auth.bearer_token "+
			"(RIPEN_HTTP_AUTH_BEARER_TOKEN) or username and password, or allow_unauthenticated: true", c.HTTP)
	}
	if a := c.HTTPAuth; (a.Username == "") != (a.Password == "") {
		v.add("http_auth", "username and password must be given together")
	}
	if c.Log != LogJSON && c.Log != LogConsole {
		v.add("log", "unknown encoding %q (valid: %s, %s)", c.Log, LogJSON, LogConsole)
	}

	p := c.Pipeline
	if p.FlushEvents < 1 {
		v.add("pipeline.flush_events", "%d must be at least 1", p.FlushEvents)
	}
	v.positive("pipeline.flush_interval", p.FlushInterval)
	if p.Lateness < 0 {
		v.add("pipeline.lateness", "%v must not be negative", p.Lateness)
	}
	v.positive("pipeline.refit_every", p.RefitEvery)
	if !(p.PublishThreshold > 0 && p.PublishThreshold <= 1) {
		v.add("pipeline.publish_threshold", "%v not in (0, 1]", p.PublishThreshold)
	}
	v.positive("pipeline.publish_every", p.PublishEvery)
	if p.PublishEvery > 0 && p.RefitEvery > 0 && p.PublishEvery < p.RefitEvery {
		v.add("pipeline.publish_every", "%v is shorter than refit_every %v; publication happens on refit ticks", p.PublishEvery, p.RefitEvery)
	}
	v.positive("pipeline.orphan_ttl", p.OrphanTTL)
	v.positive("pipeline.idle_timeout", p.IdleTimeout)
	if p.HoldbackCap < 1 {
		v.add("pipeline.holdback_cap", "%d must be at least 1", p.HoldbackCap)
	}

	l := c.Limits
	for _, f := range []struct {
		key string
		n   int
	}{
		{"limits.max_experiments", l.MaxExperiments},
		{"limits.max_arms", l.MaxArms},
		{"limits.max_orphans_per_partition", l.MaxOrphansPerPartition},
	} {
		if f.n < 1 {
			v.add(f.key, "%d must be at least 1", f.n)
		}
	}
	v.positive("shutdown_timeout", c.ShutdownTimeout)

	for _, e := range c.Defaults.problems(l.MaxArms) {
		v.errs = append(v.errs, fmt.Errorf("defaults.%w", e))
	}
	for _, id := range slices.Sorted(maps.Keys(c.Experiments)) {
		path := fmt.Sprintf("experiments[%q]", id)
		if err := checkText("experiment id", id); err != nil {
			v.add(path, "%v", err)
			continue
		}
		for _, e := range c.ExperimentFor(id).problems(l.MaxArms) {
			v.errs = append(v.errs, fmt.Errorf("%s.%w", path, e))
		}
	}
	if len(c.Experiments) > l.MaxExperiments && l.MaxExperiments > 0 {
		v.add("experiments", "%d overrides exceed limits.max_experiments %d", len(c.Experiments), l.MaxExperiments)
	}
	for _, id := range slices.Sorted(maps.Keys(c.Control)) {
		path := fmt.Sprintf("control[%q]", id)
		if err := c.Control[id].check(); err != nil {
			v.add(path, "%v", err)
			continue
		}
		for _, e := range c.ExperimentFor(id).problems(l.MaxArms) {
			v.errs = append(v.errs, fmt.Errorf("%s.%w", path, e))
		}
	}
	return errors.Join(v.errs...)
}

// Validate reports every problem of the effective experiment settings e
// (as returned by ExperimentFor) joined into one error. Arm names in Paused
// are checked for form only: which arms exist is not known here.
func (e ExperimentConfig) Validate() error {
	return errors.Join(e.problems(0)...)
}

// problems lists what is wrong with e, each error starting with the field's
// YAML key; maxArms > 0 also bounds the paused list.
func (e ExperimentConfig) problems(maxArms int) []error {
	e = e.WithDefaults()
	var v validator
	if e.Window <= MinWindow || e.Window%time.Millisecond != 0 {
		v.add("window", "%v must be more than %v and a whole number of milliseconds", e.Window, MinWindow)
	}
	if !slices.Contains(estimator.PolicyNames(), e.Policy) {
		v.add("policy", "unknown policy %q (valid: %s)", e.Policy, strings.Join(estimator.PolicyNames(), ", "))
	}
	if !slices.Contains(DelayNames(), e.Delay) {
		v.add("delay", "unknown delay family %q (valid: %s)", e.Delay, strings.Join(DelayNames(), ", "))
	}
	if e.Attribution != AttributionIndexed && e.Attribution != AttributionCarried {
		v.add("attribution", "unknown attribution %q (valid: %s, %s)", e.Attribution, AttributionIndexed, AttributionCarried)
	}
	v.unit("floor", *e.Floor)
	v.unit("cap", *e.Cap)
	if *e.Cap == 0 {
		v.add("cap", "must be positive")
	}
	v.unit("max_change", *e.MaxChange)
	if *e.Floor > *e.Cap {
		v.add("floor", "%v above cap %v", *e.Floor, *e.Cap)
	}
	if *e.BurnInClicks < 0 {
		v.add("burn_in_clicks", "%d must not be negative", *e.BurnInClicks)
	}
	if *e.BurnInConversions < 0 {
		v.add("burn_in_conversions", "%d must not be negative", *e.BurnInConversions)
	}
	if sp := *e.SettleProbability; !(sp > 0 && sp < 1) {
		v.add("settle_probability", "%v not in (0, 1)", sp)
	}
	if sl := *e.SettleLoss; !(sl >= 0 && sl < 1) {
		v.add("settle_loss", "%v not in [0, 1)", sl)
	}
	if maxArms > 0 && len(e.Paused) > maxArms {
		v.add("paused", "%d arms exceed limits.max_arms %d", len(e.Paused), maxArms)
	}
	dup := map[string]bool{}
	for i, a := range e.Paused {
		if err := checkText("arm", a); err != nil {
			v.add(fmt.Sprintf("paused[%d]", i), "%v", err)
		} else if dup[a] {
			v.add(fmt.Sprintf("paused[%d]", i), "arm %q listed twice", a)
		}
		dup[a] = true
	}
	return v.errs
}

// AllocationOptions turns the effective settings e (as returned by
// ExperimentFor) into the estimator's allocation options, with the named
// policy at its default settings.
func (e ExperimentConfig) AllocationOptions() (estimator.AllocationOptions, error) {
	if err := e.Validate(); err != nil {
		return estimator.AllocationOptions{}, err
	}
	e = e.WithDefaults()
	pol, err := estimator.ParsePolicy(e.Policy)
	if err != nil {
		return estimator.AllocationOptions{}, fmt.Errorf("policy: %w", err)
	}
	o := estimator.DefaultAllocationOptions()
	o.Policy = pol
	o.Floor = *e.Floor
	o.Cap = *e.Cap
	o.MaxChange = *e.MaxChange
	o.BurnInClicks = float64(*e.BurnInClicks)
	o.BurnInConversions = float64(*e.BurnInConversions)
	o.SettleConfidence = *e.SettleProbability
	o.SettleTolerance = *e.SettleLoss
	return o, nil
}

// DelayFamily returns the estimator's delay family named by e.Delay
// (FamilyAuto when empty), or an error naming the valid values.
func (e ExperimentConfig) DelayFamily() (estimator.DelayFamily, error) {
	for _, f := range []estimator.DelayFamily{estimator.FamilyAuto, estimator.FamilyExponential, estimator.FamilyWeibull, estimator.FamilyHistogram} {
		if e.Delay == f.String() || (e.Delay == "" && f == estimator.FamilyAuto) {
			return f, nil
		}
	}
	return 0, fmt.Errorf("unknown delay family %q (valid: %s)", e.Delay, strings.Join(DelayNames(), ", "))
}

// validator collects problems, each prefixed with a setting's path.
type validator struct{ errs []error }

func (v *validator) add(path, format string, args ...any) {
	v.errs = append(v.errs, fmt.Errorf("%s: %s", path, fmt.Sprintf(format, args...)))
}

func (v *validator) positive(path string, d time.Duration) {
	if d <= 0 {
		v.add(path, "%v must be positive", d)
	}
}

func (v *validator) unit(path string, x float64) {
	if !(x >= 0 && x <= 1) {
		v.add(path, "%v not in [0, 1]", x)
	}
}

func (v *validator) tls(path string, t TLSConfig) {
	if (t.CertFile == "") != (t.KeyFile == "") {
		v.add(path, "cert_file and key_file must be given together")
	}
	if !t.Enabled && (t.CAFile != "" || t.CertFile != "" || t.ServerName != "" || t.InsecureSkipVerify) {
		v.add(path+".enabled", "TLS settings are given but enabled is false")
	}
}

// checkHostPort accepts host:port with a numeric port in [1, 65535]; the
// host may be empty (all interfaces).
func checkHostPort(addr string) error {
	_, port, err := net.SplitHostPort(addr)
	if err != nil {
		return fmt.Errorf("address %q: want host:port", addr)
	}
	n, err := strconv.Atoi(port)
	if err != nil || n < 0 || n > 65535 {
		return fmt.Errorf("address %q: port %q is not a number in [0, 65535]", addr, port)
	}
	return nil
}

// checkTopic applies Kafka's topic name rules: 1 to 249 characters from
// [a-zA-Z0-9._-], not "." or "..".
func checkTopic(name string) error {
	switch {
	case name == "":
		return errors.New("must not be empty")
	case len(name) > 249:
		return fmt.Errorf("topic name has %d characters, limit 249", len(name))
	case name == "." || name == "..":
		return fmt.Errorf("topic name %q is not allowed", name)
	}
	for _, r := range name {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '.' || r == '_' || r == '-') {
			return fmt.Errorf("topic name %q contains %q; allowed are letters, digits, '.', '_' and '-'", name, r)
		}
	}
	return nil
}

// checkText applies the event text rules to an id or a name: non-empty, at
// most MaxFieldBytes bytes, valid UTF-8 without control characters or U+FFFD.
func checkText(what, s string) error {
	switch {
	case s == "":
		return fmt.Errorf("%s is empty", what)
	case len(s) > MaxFieldBytes:
		return fmt.Errorf("%s has %d bytes, limit %d", what, len(s), MaxFieldBytes)
	case !utf8.ValidString(s):
		return fmt.Errorf("%s is not valid UTF-8", what)
	}
	for _, r := range s {
		if r == utf8.RuneError || unicode.IsControl(r) {
			return fmt.Errorf("%s contains character %U", what, r)
		}
	}
	return nil
}

// ControlMessage is a run-time override of one experiment's settings, read
// from the control topic: the Kafka key is the experiment id, the value a
// JSON object with any of the fields below. Absent (or null) fields inherit
// from the file's settings for the experiment; each message replaces the
// experiment's previous control message as a whole, so a compacted control
// topic (latest message per key) reproduces the same settings on replay.
// An empty value (a tombstone) removes the experiment's control override.
type ControlMessage struct {
	// Window is a duration such as "36h" or "7d".
	Window            string   `json:"window,omitempty"`
	Policy            string   `json:"policy,omitempty"`
	Delay             string   `json:"delay,omitempty"`
	Floor             *float64 `json:"floor,omitempty"`
	Cap               *float64 `json:"cap,omitempty"`
	MaxChange         *float64 `json:"max_change,omitempty"`
	BurnInClicks      *int     `json:"burn_in_clicks,omitempty"`
	BurnInConversions *int     `json:"burn_in_conversions,omitempty"`
	SettleProbability *float64 `json:"settle_probability,omitempty"`
	SettleLoss        *float64 `json:"settle_loss,omitempty"`
	// Paused: null or absent inherits; [] pauses nothing.
	Paused []string `json:"paused"`
	// Ended: null or absent inherits; true ends, false revives.
	Ended *bool `json:"ended,omitempty"`
}

// maxControlBytes bounds a control message value.
const maxControlBytes = 64 << 10

// DecodeControl decodes a control message with the experiment id in key.
// Unknown fields, trailing data, bad durations and ids that break the event
// text rules are a *RejectError with ReasonBadControl.
func DecodeControl(key, value []byte) (string, ControlMessage, error) {
	id := string(key)
	if err := checkText("experiment id (message key)", id); err != nil {
		return "", ControlMessage{}, &RejectError{Reason: ReasonBadControl, Detail: err.Error()}
	}
	if len(value) > maxControlBytes {
		return id, ControlMessage{}, &RejectError{Reason: ReasonBadControl, Detail: fmt.Sprintf("experiment %q: value has %d bytes, limit %d", id, len(value), maxControlBytes)}
	}
	var m ControlMessage
	dec := json.NewDecoder(bytes.NewReader(value))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&m); err != nil {
		return id, ControlMessage{}, &RejectError{Reason: ReasonBadControl, Detail: fmt.Sprintf("experiment %q: %v", id, err)}
	}
	if _, err := dec.Token(); err != io.EOF {
		return id, ControlMessage{}, &RejectError{Reason: ReasonBadControl, Detail: fmt.Sprintf("experiment %q: data after the JSON object", id)}
	}
	if err := m.check(); err != nil {
		return id, ControlMessage{}, &RejectError{Reason: ReasonBadControl, Detail: fmt.Sprintf("experiment %q: %v", id, err)}
	}
	return id, m, nil
}

// check reports a malformed field that applyTo would otherwise ignore.
func (m ControlMessage) check() error {
	if m.Window != "" {
		if _, err := estimator.ParseDuration(m.Window); err != nil {
			return fmt.Errorf("window: %w", err)
		}
	}
	return nil
}

// applyTo returns e with m's set fields replacing e's.
func (m ControlMessage) applyTo(e ExperimentConfig) ExperimentConfig {
	o := ExperimentConfig{
		Policy: m.Policy, Delay: m.Delay,
		Floor: m.Floor, Cap: m.Cap, MaxChange: m.MaxChange,
		BurnInClicks: m.BurnInClicks, BurnInConversions: m.BurnInConversions,
		SettleProbability: m.SettleProbability, SettleLoss: m.SettleLoss,
		Paused: m.Paused,
	}
	if m.Window != "" {
		if d, err := estimator.ParseDuration(m.Window); err == nil {
			o.Window = d
		}
	}
	e = e.overlay(o)
	if m.Ended != nil {
		e.Ended = *m.Ended
	}
	return e
}

// ApplyControl returns c with the control message (key = experiment id,
// value = JSON ControlMessage, empty = tombstone) in effect. c is not
// modified; its Control map is copied. A message that does not decode, that
// would make the experiment's effective settings invalid, or that would
// exceed limits.max_experiments is a *RejectError with ReasonBadControl, and
// c is returned unchanged.
func (c Config) ApplyControl(key, value []byte) (Config, error) {
	if len(value) == 0 {
		id := string(key)
		if err := checkText("experiment id (message key)", id); err != nil {
			return c, &RejectError{Reason: ReasonBadControl, Detail: err.Error()}
		}
		if _, ok := c.Control[id]; ok {
			c.Control = maps.Clone(c.Control)
			delete(c.Control, id)
		}
		return c, nil
	}
	id, m, err := DecodeControl(key, value)
	if err != nil {
		return c, err
	}
	if _, ok := c.Control[id]; !ok && c.Limits.MaxExperiments > 0 && len(c.Control) >= c.Limits.MaxExperiments {
		return c, &RejectError{Reason: ReasonBadControl, Detail: fmt.Sprintf("experiment %q: %d control overrides already, limits.max_experiments is %d", id, len(c.Control), c.Limits.MaxExperiments)}
	}
	next := c
	next.Control = maps.Clone(c.Control)
	if next.Control == nil {
		next.Control = map[string]ControlMessage{}
	}
	next.Control[id] = m
	if errs := next.ExperimentFor(id).problems(c.Limits.MaxArms); len(errs) > 0 {
		return c, &RejectError{Reason: ReasonBadControl, Detail: fmt.Sprintf("experiment %q: %v", id, joinLines(errs))}
	}
	return next, nil
}

// joinLines joins error texts with "; " for a one-line detail.
func joinLines(errs []error) string {
	s := make([]string, len(errs))
	for i, e := range errs {
		s[i] = e.Error()
	}
	return strings.Join(s, "; ")
}
