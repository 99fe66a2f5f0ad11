package main

import (
	"bytes"
	"context"
	"strings"
	"testing"
)

// TestBenchFlagErrors checks that bad flags are refused with exit code 2.
func TestBenchFlagErrors(t *testing.T) {
	for _, args := range [][]string{{"--events", "0"}, {"--format", "xml"}, {"--index-clicks", "-1", "--events", "10"}} {
		t.Run(strings.Join(args, " "), func(t *testing.T) {
			cmd := newBenchCmd()
			cmd.SetOut(&bytes.Buffer{})
			cmd.SetErr(&bytes.Buffer{})
			cmd.SetArgs(args)
			err := cmd.ExecuteContext(context.Background())
			ee, ok := err.(*exitError)
			if !ok || ee.code != 2 {
				t.Errorf("bench %v: error %v, want exit code 2", args, err)
			}
		})
	}
}
