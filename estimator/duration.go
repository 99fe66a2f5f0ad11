package estimator

import (
	"fmt"
	"strconv"
	"strings"
	"time"
)

// ParseDuration parses a duration in Go syntax ("500ms", "1h30m") or as a
// whole or fractional number of days or weeks ("7d", "1.5d", "2w"): the
// syntax of windows and periods in configuration, scenarios and flags.
func ParseDuration(s string) (time.Duration, error) {
	t := strings.TrimSpace(s)
	for _, u := range []struct {
		suffix string
		unit   time.Duration
	}{{"d", 24 * time.Hour}, {"w", 7 * 24 * time.Hour}} {
		if num, ok := strings.CutSuffix(t, u.suffix); ok {
			f, err := strconv.ParseFloat(num, 64)
			// 15000 weeks is below the ~292 years a Duration holds.
			if err != nil || f < 0 || f*float64(u.unit) > float64(15000*7*24*time.Hour) || num != strings.TrimSpace(num) || strings.ContainsAny(num, "eEnNxX_") {
				return 0, fmt.Errorf("duration %q: want a non-negative number of %s such as 7%s, or Go syntax such as 90m", s, u.suffix, u.suffix)
			}
			return time.Duration(f * float64(u.unit)), nil
		}
	}
	d, err := time.ParseDuration(t)
	if err != nil {
		return 0, fmt.Errorf("duration %q: want Go syntax such as 90m or 1h30m, or days such as 7d", s)
	}
	return d, nil
}
