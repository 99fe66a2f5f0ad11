package main

import (
	"fmt"
	"strconv"
	"strings"
	"time"
)

// parseSpan parses a duration as time.ParseDuration does, and also whole or
// fractional days ("7d") and weeks ("2w"), the units windows are quoted in.
func parseSpan(s string) (time.Duration, error) {
	t := strings.TrimSpace(s)
	for suffix, unit := range map[string]time.Duration{"d": 24 * time.Hour, "w": 7 * 24 * time.Hour} {
		if num, ok := strings.CutSuffix(t, suffix); ok {
			f, err := strconv.ParseFloat(num, 64)
			if err != nil || f < 0 || f > 1e5 {
				return 0, fmt.Errorf("duration %q: want a number of %s such as 7%s", s, suffix, suffix)
			}
			return time.Duration(f * float64(unit)), nil
		}
	}
	d, err := time.ParseDuration(t)
	if err != nil {
		return 0, fmt.Errorf("duration %q: %w", s, err)
	}
	return d, nil
}
