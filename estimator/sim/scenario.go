// Package sim runs closed-loop simulations of delay-aware traffic
// allocation: synthetic clicks are split between arms by a policy's current
// weights, conversions are revealed after their delays, and the arms' states
// are refitted on an update interval with the same estimator code the
// service uses. It measures regret, traffic to the best arm, the settle
// rule and the error of the conversion-rate estimates.
//
// The package is pure: it reads only what the caller passes in, never reads
// a clock, and its results are a deterministic function of the scenario and
// the seed, whatever the number of goroutines used.
package sim

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"ripen/estimator"
)

// Limits of a scenario, checked by Validate.
const (
	// MaxRuns is the largest number of runs a scenario may ask for.
	MaxRuns = 10000
	// MaxUpdates is the largest number of update intervals in a horizon.
	MaxUpdates = 20000
	// MaxExpectedClicks bounds clicks per hour times the horizon.
	MaxExpectedClicks = 1e8
	// MinDelayMassInWindow is the smallest share of an arm's delay
	// distribution that must fall within the window (delays are drawn from
	// the distribution conditioned on falling within it).
	MinDelayMassInWindow = 0.2
)

// Defaults of a scenario, applied by WithDefaults to zero fields.
const (
	// DefaultRuns is the number of seeded runs per policy. Default: 20.
	DefaultRuns = 20
	// DefaultSeed is the base seed. Default: 1.
	DefaultSeed = 1
	// DefaultUpdateInterval is the refit interval. Default: 6h.
	DefaultUpdateInterval = 6 * time.Hour
	// DefaultFitFamily is the delay family fitted by the simulated service:
	// the exponential family is the cheapest, and the fit cost (every arm at
	// every update) dominates a simulation. Default: exponential.
	DefaultFitFamily = "exponential"
)

// Duration is a time span in a scenario file: a Go duration ("90m", "36h")
// or a number of days or weeks ("7d", "1.5d", "2w").
type Duration time.Duration

// D returns d as a time.Duration.
func (d Duration) D() time.Duration { return time.Duration(d) }

// Hours returns d in hours.
func (d Duration) Hours() float64 { return time.Duration(d).Hours() }

// String formats d as a Go duration.
func (d Duration) String() string { return time.Duration(d).String() }

// UnmarshalYAML implements yaml.Unmarshaler.
func (d *Duration) UnmarshalYAML(n *yaml.Node) error {
	if n.Kind != yaml.ScalarNode {
		return fmt.Errorf("line %d: want a duration such as 6h or 7d", n.Line)
	}
	v, err := estimator.ParseDuration(n.Value)
	if err != nil {
		return fmt.Errorf("line %d: %w", n.Line, err)
	}
	*d = Duration(v)
	return nil
}

// MarshalYAML implements yaml.Marshaler.
func (d Duration) MarshalYAML() (any, error) { return d.String(), nil }

// Scenario is a simulated experiment: traffic, arms with their true
// eventual conversion rates and delay distributions, change points, and how
// the service refits.
type Scenario struct {
	// Name identifies the scenario in reports; required.
	Name string `yaml:"name"`
	// Description is free text for reports.
	Description string `yaml:"description,omitempty"`
	// Horizon is how long the experiment runs; required.
	Horizon Duration `yaml:"horizon"`
	// ClicksPerHour is the mean traffic; required, > 0.
	ClicksPerHour float64 `yaml:"clicks_per_hour"`
	// DiurnalAmplitude modulates traffic by a day cycle peaking at 12:00
	// UTC: the rate is ClicksPerHour*(1 + A*sin(2*pi*(hour-6)/24)), A in
	// [0, 1). Default: 0 (flat traffic).
	DiurnalAmplitude float64 `yaml:"diurnal_amplitude,omitempty"`
	// UpdateInterval is how often the service refits and publishes weights.
	// Default: DefaultUpdateInterval.
	UpdateInterval Duration `yaml:"update_interval,omitempty"`
	// Window is the attribution window. Default: estimator.DefaultWindow.
	Window Duration `yaml:"window,omitempty"`
	// FitFamily is the delay family the service fits (auto, exponential,
	// weibull, histogram). Default: DefaultFitFamily.
	FitFamily string `yaml:"fit_family,omitempty"`
	// Arms are the experiment's arms, at least two.
	Arms []Arm `yaml:"arms"`
	// ChangePoints change an arm's eventual conversion rate from a time on.
	ChangePoints []ChangePoint `yaml:"change_points,omitempty"`
	// Runs is the number of seeded runs per policy. Default: DefaultRuns.
	Runs int `yaml:"runs,omitempty"`
	// Seed is the base seed; run r uses a seed derived from it and r.
	// Default: DefaultSeed.
	Seed uint64 `yaml:"seed,omitempty"`
}

// Arm is one simulated arm.
type Arm struct {
	// Name is unique within the scenario; required.
	Name string `yaml:"name"`
	// CVR is the true eventual conversion rate: the probability that a click
	// converts within the attribution window. In [0, 1].
	CVR float64 `yaml:"cvr"`
	// Delay is the distribution of a converter's delay, conditioned on
	// falling within the window.
	Delay DelaySpec `yaml:"delay"`
}

// ChangePoint sets an arm's eventual conversion rate to CVR for clicks from
// At (since the start of the experiment) on.
type ChangePoint struct {
	At  Duration `yaml:"at"`
	Arm string   `yaml:"arm"`
	CVR float64  `yaml:"cvr"`
}

// DelayKind holds exactly one parametric delay distribution.
type DelayKind struct {
	Exponential *ExponentialDelay `yaml:"exponential,omitempty"`
	Weibull     *WeibullDelay     `yaml:"weibull,omitempty"`
	Lognormal   *LognormalDelay   `yaml:"lognormal,omitempty"`
	Constant    *ConstantDelay    `yaml:"constant,omitempty"`
}

// DelaySpec is an arm's delay distribution: one parametric kind, or a
// weighted Mixture of them.
type DelaySpec struct {
	DelayKind `yaml:",inline"`
	// Mixture components; their weights are normalised to sum to 1.
	Mixture []MixtureComponent `yaml:"mixture,omitempty"`
}

// MixtureComponent is one weighted component of a delay mixture.
type MixtureComponent struct {
	// Weight is the component's relative weight, > 0.
	Weight    float64 `yaml:"weight"`
	DelayKind `yaml:",inline"`
}

// ExponentialDelay is an exponential delay with the given mean.
type ExponentialDelay struct {
	Mean Duration `yaml:"mean"`
}

// WeibullDelay is a Weibull delay, CDF 1 - exp(-(t/Scale)^Shape).
type WeibullDelay struct {
	Shape float64  `yaml:"shape"`
	Scale Duration `yaml:"scale"`
}

// LognormalDelay is a lognormal delay: log(delay) is normal with mean
// log(Median) and standard deviation Sigma.
type LognormalDelay struct {
	Median Duration `yaml:"median"`
	Sigma  float64  `yaml:"sigma"`
}

// ConstantDelay converts exactly Delay after the click (zero allowed).
type ConstantDelay struct {
	Delay Duration `yaml:"delay"`
}

// ParseScenario decodes one YAML scenario document strictly (unknown and
// duplicate keys and extra documents are errors), applies defaults and
// validates it.
func ParseScenario(r io.Reader) (*Scenario, error) {
	data, err := io.ReadAll(r)
	if err != nil {
		return nil, fmt.Errorf("read scenario: %w", err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	dec.KnownFields(true)
	var sc Scenario
	if err := dec.Decode(&sc); err != nil {
		if errors.Is(err, io.EOF) {
			return nil, errors.New("parse scenario: empty document")
		}
		return nil, fmt.Errorf("parse scenario: %w", err)
	}
	var extra yaml.Node
	if err := dec.Decode(&extra); !errors.Is(err, io.EOF) {
		return nil, errors.New("parse scenario: more than one YAML document")
	}
	sc = sc.WithDefaults()
	if err := sc.Validate(); err != nil {
		return nil, err
	}
	return &sc, nil
}

// WithDefaults returns s with every zero optional field set to its default.
func (s Scenario) WithDefaults() Scenario {
	if s.UpdateInterval == 0 {
		s.UpdateInterval = Duration(DefaultUpdateInterval)
	}
	if s.Window == 0 {
		s.Window = Duration(estimator.DefaultWindow)
	}
	if s.FitFamily == "" {
		s.FitFamily = DefaultFitFamily
	}
	if s.Runs == 0 {
		s.Runs = DefaultRuns
	}
	if s.Seed == 0 {
		s.Seed = DefaultSeed
	}
	return s
}

// Validate reports every problem of s (after defaults), each prefixed with
// the offending field.
func (s Scenario) Validate() error {
	s = s.WithDefaults()
	var errs []error
	add := func(format string, a ...any) { errs = append(errs, fmt.Errorf(format, a...)) }
	if strings.TrimSpace(s.Name) == "" {
		add("name: required")
	}
	if s.Horizon <= 0 {
		add("horizon: required, must be positive")
	}
	if !(s.ClicksPerHour > 0) || math.IsInf(s.ClicksPerHour, 0) {
		add("clicks_per_hour: %v must be positive", s.ClicksPerHour)
	} else if s.Horizon > 0 && s.ClicksPerHour*s.Horizon.Hours() > MaxExpectedClicks {
		add("clicks_per_hour: %v over %v is more than %g clicks", s.ClicksPerHour, s.Horizon, MaxExpectedClicks)
	}
	if !(s.DiurnalAmplitude >= 0 && s.DiurnalAmplitude < 1) {
		add("diurnal_amplitude: %v must be in [0, 1)", s.DiurnalAmplitude)
	}
	if s.UpdateInterval < Duration(time.Minute) {
		add("update_interval: %v must be at least 1m", s.UpdateInterval)
	} else if s.Horizon > 0 {
		if s.UpdateInterval > s.Horizon {
			add("update_interval: %v exceeds the horizon %v", s.UpdateInterval, s.Horizon)
		}
		if n := s.Horizon.D() / s.UpdateInterval.D(); n > MaxUpdates {
			add("update_interval: %v gives %d updates over the horizon, more than %d", s.UpdateInterval, n, MaxUpdates)
		}
	}
	if err := (estimator.Layout{Window: s.Window.D()}).Validate(); err != nil {
		add("window: %w", err)
	}
	if _, err := estimator.ParseDelayFamily(s.FitFamily); err != nil {
		add("fit_family: %w", err)
	}
	if s.Runs < 1 || s.Runs > MaxRuns {
		add("runs: %d must be in [1, %d]", s.Runs, MaxRuns)
	}
	if len(s.Arms) < 2 {
		add("arms: need at least two, got %d", len(s.Arms))
	}
	names := make(map[string]bool, len(s.Arms))
	for i, a := range s.Arms {
		if strings.TrimSpace(a.Name) == "" {
			add("arms[%d].name: required", i)
		} else if names[a.Name] {
			add("arms[%d].name: duplicate arm %q", i, a.Name)
		}
		names[a.Name] = true
		if !(a.CVR >= 0 && a.CVR <= 1) {
			add("arms[%d].cvr: %v must be in [0, 1]", i, a.CVR)
		}
		d, err := a.Delay.Distribution()
		if err != nil {
			add("arms[%d].delay: %w", i, err)
			continue
		}
		if m := d.CDF(s.Window.D().Seconds()); m < MinDelayMassInWindow {
			add("arms[%d].delay: only %.3g of the delay distribution falls within the window %v; at least %g required", i, m, s.Window, MinDelayMassInWindow)
		}
	}
	for i, c := range s.ChangePoints {
		if !names[c.Arm] {
			add("change_points[%d].arm: unknown arm %q", i, c.Arm)
		}
		if !(c.At > 0 && c.At < s.Horizon) {
			add("change_points[%d].at: %v must be within the horizon (0, %v)", i, c.At, s.Horizon)
		}
		if !(c.CVR >= 0 && c.CVR <= 1) {
			add("change_points[%d].cvr: %v must be in [0, 1]", i, c.CVR)
		}
	}
	if err := errors.Join(errs...); err != nil {
		return fmt.Errorf("scenario %q: %w", s.Name, err)
	}
	return nil
}

// ArmNames returns the arms' names in scenario order.
func (s Scenario) ArmNames() []string {
	out := make([]string, len(s.Arms))
	for i, a := range s.Arms {
		out[i] = a.Name
	}
	return out
}

// CVRAt returns every arm's true eventual conversion rate for a click made
// at elapsed time t since the start (change points applied in order of
// time; on equal times, in file order).
func (s Scenario) CVRAt(t time.Duration) []float64 {
	q := make([]float64, len(s.Arms))
	for i, a := range s.Arms {
		q[i] = a.CVR
	}
	idx := make(map[string]int, len(s.Arms))
	for i, a := range s.Arms {
		idx[a.Name] = i
	}
	for _, c := range s.sortedChanges() {
		if c.At.D() <= t {
			q[idx[c.Arm]] = c.CVR
		}
	}
	return q
}

// sortedChanges returns the change points by time, stable on ties.
func (s Scenario) sortedChanges() []ChangePoint {
	cs := append([]ChangePoint(nil), s.ChangePoints...)
	for i := 1; i < len(cs); i++ {
		for j := i; j > 0 && cs[j].At < cs[j-1].At; j-- {
			cs[j], cs[j-1] = cs[j-1], cs[j]
		}
	}
	return cs
}
