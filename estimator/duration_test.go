package estimator

import (
	"testing"
	"time"
)

// TestParseDuration checks day and week durations and, for Go syntax,
// agreement with time.ParseDuration (the standard library as reference).
func TestParseDuration(t *testing.T) {
	for _, tc := range []struct {
		in   string
		want time.Duration
		bad  bool
	}{
		{in: "7d", want: 7 * 24 * time.Hour},
		{in: "1.5d", want: 36 * time.Hour},
		{in: "0.25d", want: 6 * time.Hour},
		{in: "2w", want: 14 * 24 * time.Hour},
		{in: " 3d ", want: 72 * time.Hour},
		{in: "0d", want: 0},
		{in: "90m", want: 90 * time.Minute},
		{in: "0s", want: 0},
		{in: "7x", bad: true},
		{in: "abc", bad: true},
		{in: "7", bad: true},
		{in: "d", bad: true},
		{in: "-1d", bad: true},
		{in: "7 d", bad: true},
		{in: "1e1d", bad: true},
		{in: "infd", bad: true},
		{in: "7days", bad: true},
		{in: "200000w", bad: true},
		{in: "", bad: true},
	} {
		t.Run(tc.in, func(t *testing.T) {
			got, err := ParseDuration(tc.in)
			if tc.bad {
				if err == nil {
					t.Errorf("ParseDuration(%q) = %v, want error", tc.in, got)
				}
				return
			}
			if err != nil || got != tc.want {
				t.Errorf("ParseDuration(%q) = %v, %v; want %v", tc.in, got, err, tc.want)
			}
		})
	}
	for _, s := range []string{"500ms", "1h30m", "90m", "2h45m30.5s", "-5m", "1.5h", "300us", "abc", "1x"} {
		t.Run("go/"+s, func(t *testing.T) {
			want, wantErr := time.ParseDuration(s)
			got, err := ParseDuration(s)
			if (err != nil) != (wantErr != nil) || got != want {
				t.Errorf("ParseDuration(%q) = %v, %v; time.ParseDuration = %v, %v", s, got, err, want, wantErr)
			}
		})
	}
}
