package main

import (
	"testing"
	"time"
)

func TestParseSpan(t *testing.T) {
	cases := []struct {
		in   string
		want time.Duration
		ok   bool
	}{
		{"7d", 7 * 24 * time.Hour, true},
		{"1.5d", 36 * time.Hour, true},
		{"2w", 14 * 24 * time.Hour, true},
		{"36h", 36 * time.Hour, true},
		{"90m", 90 * time.Minute, true},
		{" 3d ", 3 * 24 * time.Hour, true},
		{"d", 0, false},
		{"-1d", 0, false},
		{"seven days", 0, false},
		{"", 0, false},
	}
	for _, c := range cases {
		t.Run(c.in, func(t *testing.T) {
			got, err := parseSpan(c.in)
			if (err == nil) != c.ok || (c.ok && got != c.want) {
				t.Fatalf("parseSpan(%q) = %v, %v; want %v ok=%v", c.in, got, err, c.want, c.ok)
			}
		})
	}
}
