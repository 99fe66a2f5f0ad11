package consumer

import (
	"encoding/json"
	"fmt"
	"strconv"
	"strings"
	"time"
)

// ExperimentSettings are the settings in force for one experiment and
// where each comes from, for people (the console's configuration table).
type ExperimentSettings struct {
	// Effective are the settings in force (ExperimentFor).
	Effective ExperimentConfig
	// RefitEvery, PublishEvery and Lateness are the pipeline settings
	// that shape every experiment's allocations.
	RefitEvery, PublishEvery, Lateness time.Duration
	// Control is the control message in force as JSON, "" when none.
	Control string

	defaults, override, control ExperimentConfig
	hasOverride, hasControl     bool
	endedByControl              *bool
}

// SettingField is one row of ExperimentSettings.Fields.
type SettingField struct {
	// Key is the setting's YAML key.
	Key string
	// Value is its value in force, as text.
	Value string
	// Source is where the value comes from: "control topic", "config
	// (experiments)", "config (defaults)" or "built-in default".
	Source string
}

// Sources of SettingField.
const (
	SourceControl  = "control topic"
	SourceOverride = "config (experiments)"
	SourceDefaults = "config (defaults)"
	SourceBuiltIn  = "built-in default"
	SourcePipeline = "config (pipeline)"
)

// SettingsFor returns the settings in force for experiment id.
func (c Config) SettingsFor(id string) ExperimentSettings {
	s := ExperimentSettings{
		Effective:  c.ExperimentFor(id),
		RefitEvery: c.Pipeline.RefitEvery, PublishEvery: c.Pipeline.PublishEvery, Lateness: c.Pipeline.Lateness,
		defaults: c.Defaults,
	}
	if o, ok := c.Experiments[id]; ok {
		s.override, s.hasOverride = o, true
	}
	if m, ok := c.Control[id]; ok {
		s.control, s.hasControl = m.applyTo(ExperimentConfig{}), true
		s.endedByControl = m.Ended
		if b, err := json.Marshal(m); err == nil {
			s.Control = string(b)
		}
	}
	return s
}

// Settings returns the settings in force for experiment id, control
// messages included.
func (s *Service) Settings(id string) ExperimentSettings { return s.config().SettingsFor(id) }

// Fields lists the settings in force, one per experiment setting and then
// the pipeline settings, each with its source.
func (s ExperimentSettings) Fields() []SettingField {
	builtIn := ExperimentConfig{}.WithDefaults()
	e := s.Effective.WithDefaults()
	type field struct {
		key   string
		value string
		// set reports whether a layer sets the field.
		set func(ExperimentConfig) bool
		// differs reports whether the defaults differ from the built-in.
		differs bool
	}
	f64 := func(p *float64) string { return strconv.FormatFloat(*p, 'g', -1, 64) }
	fields := []field{
		{"window", FormatDuration(e.Window), func(x ExperimentConfig) bool { return x.Window != 0 }, s.defaults.Window != builtIn.Window},
		{"policy", e.Policy, func(x ExperimentConfig) bool { return x.Policy != "" }, s.defaults.Policy != builtIn.Policy},
		{"delay", e.Delay, func(x ExperimentConfig) bool { return x.Delay != "" }, s.defaults.Delay != builtIn.Delay},
		{"floor", f64(e.Floor), func(x ExperimentConfig) bool { return x.Floor != nil }, neq(s.defaults.Floor, builtIn.Floor)},
		{"cap", f64(e.Cap), func(x ExperimentConfig) bool { return x.Cap != nil }, neq(s.defaults.Cap, builtIn.Cap)},
		{"max_change", f64(e.MaxChange), func(x ExperimentConfig) bool { return x.MaxChange != nil }, neq(s.defaults.MaxChange, builtIn.MaxChange)},
		{"burn_in_clicks", strconv.Itoa(*e.BurnInClicks), func(x ExperimentConfig) bool { return x.BurnInClicks != nil }, neq(s.defaults.BurnInClicks, builtIn.BurnInClicks)},
		{"burn_in_conversions", strconv.Itoa(*e.BurnInConversions), func(x ExperimentConfig) bool { return x.BurnInConversions != nil }, neq(s.defaults.BurnInConversions, builtIn.BurnInConversions)},
		{"settle_probability", f64(e.SettleProbability), func(x ExperimentConfig) bool { return x.SettleProbability != nil }, neq(s.defaults.SettleProbability, builtIn.SettleProbability)},
		{"settle_loss", f64(e.SettleLoss), func(x ExperimentConfig) bool { return x.SettleLoss != nil }, neq(s.defaults.SettleLoss, builtIn.SettleLoss)},
		{"paused", fmtList(e.Paused), func(x ExperimentConfig) bool { return x.Paused != nil }, s.defaults.Paused != nil},
		{"ended", strconv.FormatBool(e.Ended), func(x ExperimentConfig) bool { return x.Ended }, s.defaults.Ended},
		{"attribution", e.Attribution, func(x ExperimentConfig) bool { return x.Attribution != "" }, s.defaults.Attribution != builtIn.Attribution},
	}
	out := make([]SettingField, 0, len(fields)+3)
	for _, f := range fields {
		src := SourceBuiltIn
		switch {
		case s.hasControl && (f.set(s.control) || (f.key == "ended" && s.endedByControl != nil)):
			src = SourceControl
		case s.hasOverride && f.set(s.override):
			src = SourceOverride
		case f.differs:
			src = SourceDefaults
		}
		out = append(out, SettingField{Key: f.key, Value: f.value, Source: src})
	}
	for _, p := range []struct {
		key string
		d   time.Duration
	}{{"pipeline.refit_every", s.RefitEvery}, {"pipeline.publish_every", s.PublishEvery}, {"pipeline.lateness", s.Lateness}} {
		out = append(out, SettingField{Key: p.key, Value: FormatDuration(p.d), Source: SourcePipeline})
	}
	return out
}

// neq reports whether two optional values differ.
func neq[T comparable](a, b *T) bool {
	if a == nil || b == nil {
		return (a == nil) != (b == nil)
	}
	return *a != *b
}

// FormatDuration prints a whole number of days, hours, minutes or seconds
// in that unit ("7d", "2h", "90s"), else Go's form.
func FormatDuration(d time.Duration) string {
	for _, u := range []struct {
		d    time.Duration
		name string
	}{{24 * time.Hour, "d"}, {time.Hour, "h"}, {time.Minute, "m"}, {time.Second, "s"}} {
		if d > 0 && d%u.d == 0 {
			return fmt.Sprintf("%d%s", d/u.d, u.name)
		}
	}
	return d.String()
}

func fmtList(xs []string) string {
	if len(xs) == 0 {
		return "none"
	}
	return strings.Join(xs, ", ")
}
