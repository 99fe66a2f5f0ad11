package main

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/spf13/cobra"

	"ripen/estimator"
	"ripen/state"
	"ripen/state/redistest"
)

// runSub runs a freshly built command (newStateCmd or newInspectCmd) with
// args and returns its standard output.
func runSub(t *testing.T, cmd *cobra.Command, args ...string) (string, error) {
	t.Helper()
	var out, errOut bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetErr(&errOut)
	cmd.SetArgs(args)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	err := cmd.ExecuteContext(ctx)
	return out.String(), err
}

// cmdLayout is a short-window layout for the command tests.
var cmdLayout = estimator.Layout{Window: time.Hour, Base: time.Second, AgeError: 0.05, BinsPerDecade: 10}.WithDefaults()

// cmdT0 is the invented scenario's start (Unix ms).
const cmdT0 = int64(1_770_000_000_000)

// seedArm applies clicks and conversions to one arm as one delta covering
// offset off of clicks/part. Conversions convert the first clicks, with a
// delay of 10 s each.
func seedArm(t *testing.T, st *state.Store, exp, arm string, clicks, convs int, part int, off int64) {
	t.Helper()
	wm := cmdT0 + 600_000
	clickTS := wm - 60_000
	key, _ := cmdLayout.PendingBucket(clickTS, wm)
	ad := &state.ArmDelta{Clicks: []estimator.Bucket{{BucketKey: key, BucketCounts: estimator.BucketCounts{Clicks: uint64(clicks)}}}}
	for i := range convs {
		ad.Conversions = append(ad.Conversions, state.ConversionDelta{
			ClickID: exp + "-" + arm + "-" + string(rune('a'+i)), Origin: "conversions/0/" + string(rune('a'+i)) + arm,
			Bucket: key, DelayBin: cmdLayout.DelayBin(10_000), DelayMs: 10_000,
		})
	}
	_, err := st.Apply(context.Background(), &state.ExperimentDelta{
		Experiment: exp, Layout: cmdLayout, Watermark: wm, Generation: 4,
		Ranges: []state.OffsetRange{{Topic: "clicks", Partition: part, From: off, To: off}},
		Arms:   map[string]*state.ArmDelta{arm: ad},
	})
	if err != nil {
		t.Fatalf("seed %s/%s: %v", exp, arm, err)
	}
}

// newCmdStore starts a Redis and returns its URL and a Store on prefix.
func newCmdStore(t *testing.T, prefix string) (string, *state.Store, *redistest.Server) {
	t.Helper()
	srv := redistest.Start(t)
	st, err := state.New(srv.Client(), state.Options{Prefix: prefix})
	if err != nil {
		t.Fatal(err)
	}
	return "redis://" + srv.Addr() + "/0", st, srv
}

func exitCode(err error) int {
	var ee *exitError
	if errors.As(err, &ee) {
		return ee.code
	}
	if err != nil {
		return 1
	}
	return 0
}

func TestStateCommands(t *testing.T) {
	url, src, srv := newCmdStore(t, "shop")
	seedArm(t, src, "banner-test", "teal", 40, 3, 0, 10)
	seedArm(t, src, "banner-test", "amber", 35, 5, 1, 11)
	if _, err := src.SaveAllocation(context.Background(), "banner-test", []byte(`{"experiment":"banner-test","status":"collecting"}`)); err != nil {
		t.Fatal(err)
	}
	if err := src.SetResume(context.Background(), "clicks", 0, 11); err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	file := filepath.Join(dir, "snap.json")
	conn := []string{"--redis", url}

	if _, err := runSub(t, newStateCmd(), append([]string{"export", "--prefix", "shop", "--out", file}, conn...)...); err != nil {
		t.Fatalf("export: %v", err)
	}
	liveDigest, err := runSub(t, newStateCmd(), append([]string{"digest", "--prefix", "shop"}, conn...)...)
	if err != nil {
		t.Fatalf("digest: %v", err)
	}
	fileDigest, err := runSub(t, newStateCmd(), "digest", "--in", file)
	if err != nil {
		t.Fatalf("digest --in: %v", err)
	}
	if liveDigest != fileDigest || len(strings.TrimSpace(liveDigest)) != 64 {
		t.Fatalf("digests %q (live) and %q (file)", liveDigest, fileDigest)
	}
	stdout, err := runSub(t, newStateCmd(), append([]string{"export", "--prefix", "shop"}, conn...)...)
	if err != nil {
		t.Fatal(err)
	}
	snap, err := state.ReadSnapshot(strings.NewReader(stdout))
	if err != nil {
		t.Fatalf("export to stdout is not a snapshot: %v", err)
	}
	if got := state.Digest(snap) + "\n"; got != liveDigest {
		t.Fatalf("stdout export digest %q, want %q", got, liveDigest)
	}

	out, err := runSub(t, newStateCmd(), append([]string{"import", "--prefix", "copy", "--in", file}, conn...)...)
	if err != nil || !strings.Contains(out, strings.TrimSpace(liveDigest)) {
		t.Fatalf("import: %v: %q", err, out)
	}
	_, err = runSub(t, newStateCmd(), append([]string{"import", "--prefix", "copy", "--in", file}, conn...)...)
	if exitCode(err) != 3 || !errors.Is(err, state.ErrNotEmpty) {
		t.Fatalf("second import: %v (exit %d), want ErrNotEmpty with exit 3", err, exitCode(err))
	}
	if _, err := runSub(t, newStateCmd(), append([]string{"import", "--prefix", "copy", "--in", file, "--force"}, conn...)...); err != nil {
		t.Fatalf("forced import: %v", err)
	}
	out, err = runSub(t, newStateCmd(), append([]string{"diff", "--prefix", "shop", "--against", "copy"}, conn...)...)
	if err != nil || !strings.HasPrefix(out, "no differences") {
		t.Fatalf("diff after import: %v: %q", err, out)
	}

	// One more click on amber in the copy.
	copyStore, err := state.New(srv.Client(), state.Options{Prefix: "copy"})
	if err != nil {
		t.Fatal(err)
	}
	seedArm(t, copyStore, "banner-test", "amber", 1, 0, 1, 12)
	out, err = runSub(t, newStateCmd(), append([]string{"diff", "--prefix", "shop", "--against", "copy"}, conn...)...)
	if exitCode(err) != 1 {
		t.Fatalf("diff after a change: %v (exit %d), want exit 1", err, exitCode(err))
	}
	row := tableRow(t, out, "banner-test", "amber")
	// EXPERIMENT ARM KIND FIELDS CLICKS A CLICKS B CONVERSIONS A CONVERSIONS B
	if want := []string{"banner-test", "amber", "changed", "pending_clicks", "35", "36", "5", "5"}; strings.Join(row, " ") != strings.Join(want, " ") {
		t.Fatalf("diff row %q, want %q\n%s", row, want, out)
	}
	tableRow(t, out, "banner-test", "-", "changed", "offset:clicks/1")

	// Two files, and a file against the live prefix.
	file2 := filepath.Join(dir, "copy.json")
	if _, err := runSub(t, newStateCmd(), append([]string{"export", "--prefix", "copy", "--out", file2}, conn...)...); err != nil {
		t.Fatal(err)
	}
	if _, err := runSub(t, newStateCmd(), "diff", file, file2); exitCode(err) != 1 {
		t.Fatalf("diff of two files: %v, want exit 1", err)
	}
	if out, err := runSub(t, newStateCmd(), append([]string{"diff", "--prefix", "copy", file2}, conn...)...); err != nil {
		t.Fatalf("diff of a file with its prefix: %v: %s", err, out)
	}

	// Flag errors.
	for _, args := range [][]string{
		{"diff"},
		{"diff", "--against", "x", file},
		{"import", "--in", filepath.Join(dir, "missing.json")},
		{"export", "--prefix", "bad{prefix", "--redis", url},
	} {
		if _, err := runSub(t, newStateCmd(), args...); exitCode(err) != 2 {
			t.Errorf("%v: %v (exit %d), want exit 2", args, err, exitCode(err))
		}
	}
}

// TestStateConfigFile checks that --config supplies the Redis URL and
// prefix and that --prefix overrides the file.
func TestStateConfigFile(t *testing.T) {
	url, st, srv := newCmdStore(t, "fromfile")
	seedArm(t, st, "tile-test", "wide", 12, 1, 0, 0)
	other, _ := state.New(srv.Client(), state.Options{Prefix: "flagwins"})
	seedArm(t, other, "tile-test", "wide", 13, 1, 0, 0)
	cfg := filepath.Join(t.TempDir(), "ripen.yaml")
	if err := os.WriteFile(cfg, []byte("redis:\n  url: "+url+"\n  prefix: fromfile\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		args   []string
		clicks string
	}{
		{[]string{"--config", cfg}, `"Clicks": 12`},
		{[]string{"--config", cfg, "--prefix", "flagwins"}, `"Clicks": 13`},
	} {
		out, err := runSub(t, newStateCmd(), append([]string{"export"}, tc.args...)...)
		if err != nil {
			t.Fatalf("%v: %v", tc.args, err)
		}
		if !strings.Contains(out, tc.clicks) {
			t.Errorf("%v: export lacks %s:\n%s", tc.args, tc.clicks, out)
		}
	}
}

// tableRow returns the fields of the first output line whose leading
// fields are want.
func tableRow(t *testing.T, out string, want ...string) []string {
	t.Helper()
	for _, line := range strings.Split(out, "\n") {
		f := strings.Fields(line)
		if len(f) >= len(want) && strings.Join(f[:len(want)], "\x00") == strings.Join(want, "\x00") {
			return f
		}
	}
	t.Fatalf("no row starting %q in:\n%s", want, out)
	return nil
}
