package main

import (
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"text/tabwriter"

	"github.com/redis/go-redis/v9"
	"github.com/spf13/cobra"

	"ripen/consumer"
	"ripen/state"
)

// storeFlags are the Redis connection flags of `ripen state` and `ripen
// inspect`.
type storeFlags struct {
	redisURL string
	prefix   string
	config   string
}

func (f *storeFlags) bind(cmd *cobra.Command) {
	fl := cmd.Flags()
	fl.StringVar(&f.redisURL, "redis", consumer.DefaultRedisURL, "Redis `URL` (redis:// or rediss://)")
	fl.StringVar(&f.prefix, "prefix", consumer.DefaultPrefix, "Redis key `prefix`")
	fl.StringVar(&f.config, "config", "", "optional `file` of `ripen run` (its redis and kafka settings; --redis and --prefix override them)")
}

// conn is an open Redis connection and the configuration it came from.
type conn struct {
	rdb   redis.UniversalClient
	store *state.Store
	cfg   consumer.Config
}

func (c *conn) Close() error { return c.rdb.Close() }

// open connects as the flags say. With --config, the file (and RIPEN_*
// environment variables) give the Redis settings, including TLS and
// cluster seeds; --redis and --prefix, when set, override URL and prefix.
func (f *storeFlags) open(cmd *cobra.Command) (*conn, error) {
	var cfg consumer.Config
	if f.config != "" {
		c, err := consumer.LoadConfig(f.config, os.LookupEnv, nil)
		if err != nil {
			return nil, &exitError{code: 2, err: err}
		}
		cfg = c
		if cmd.Flags().Changed("redis") {
			cfg.Redis.URL = f.redisURL
		}
		if cmd.Flags().Changed("prefix") {
			cfg.Redis.Prefix = f.prefix
		}
	} else {
		cfg = consumer.Config{Redis: consumer.RedisConfig{URL: f.redisURL, Prefix: f.prefix}}.WithDefaults()
	}
	rdb, err := consumer.NewRedisClient(cfg.Redis)
	if err != nil {
		return nil, &exitError{code: 2, err: err}
	}
	st, err := state.New(rdb, state.Options{Prefix: cfg.Redis.Prefix})
	if err != nil {
		_ = rdb.Close()
		return nil, &exitError{code: 2, err: err}
	}
	return &conn{rdb: rdb, store: st, cfg: cfg}, nil
}

// newStateCmd is `ripen state`: export, import, digest and diff of the
// logical state under a prefix.
func newStateCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "state",
		Short: "Export, import, digest and compare the state stored in Redis",
		Long: `state works on the logical state under a Redis key prefix: per experiment its
layout, watermark, applied offsets, latest allocation and every arm's state in
canonical form, plus per-partition resume offsets. Join buffers (click index,
parked orphans, conversion markers) are short-lived and left out unless
export is given --join-buffers.

Stop consumers before importing; exporting while they run gives a snapshot
consistent per experiment.`,
	}
	cmd.AddCommand(newStateExportCmd(), newStateImportCmd(), newStateDigestCmd(), newStateDiffCmd())
	return cmd
}

func newStateExportCmd() *cobra.Command {
	var sf storeFlags
	var out string
	var buffers bool
	cmd := &cobra.Command{
		Use:   "export [--out FILE]",
		Short: "Write a JSON snapshot of the state under a prefix",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			c, err := sf.open(cmd)
			if err != nil {
				return err
			}
			defer c.Close()
			snap, err := c.store.ExportWith(cmd.Context(), state.ExportOptions{JoinBuffers: buffers})
			if err != nil {
				return err
			}
			if out == "" || out == "-" {
				return state.WriteSnapshot(cmd.OutOrStdout(), snap)
			}
			if err := writeFileAtomic(out, func(w io.Writer) error { return state.WriteSnapshot(w, snap) }); err != nil {
				return err
			}
			fmt.Fprintf(cmd.ErrOrStderr(), "exported %d experiments and %d resume offsets from prefix %q to %s (digest %s)\n",
				len(snap.Experiments), len(snap.Resume), snap.Prefix, out, state.Digest(snap))
			return nil
		},
	}
	sf.bind(cmd)
	cmd.Flags().StringVar(&out, "out", "", "output `file` (default: standard output)")
	cmd.Flags().BoolVar(&buffers, "join-buffers", false, "also copy click index entries, parked orphans and conversion markers (Redis DUMP form, same or newer server version to import)")
	return cmd
}

// writeFileAtomic writes path through a temporary file in the same
// directory, so that a failed export never leaves half a snapshot.
func writeFileAtomic(path string, write func(io.Writer) error) error {
	tmp, err := os.CreateTemp(filepath.Dir(path), ".ripen-snapshot-*")
	if err != nil {
		return fmt.Errorf("write %s: %w", path, err)
	}
	defer os.Remove(tmp.Name())
	if err := write(tmp); err != nil {
		_ = tmp.Close()
		return err
	}
	if err := tmp.Close(); err != nil {
		return fmt.Errorf("write %s: %w", path, err)
	}
	if err := os.Rename(tmp.Name(), path); err != nil {
		return fmt.Errorf("write %s: %w", path, err)
	}
	return nil
}

// readSnapshotFile reads a snapshot from path ("-" for standard input).
func readSnapshotFile(cmd *cobra.Command, path string) (*state.Snapshot, error) {
	var r io.Reader = cmd.InOrStdin()
	if path != "-" {
		f, err := os.Open(path)
		if err != nil {
			return nil, fmt.Errorf("snapshot: %w", err)
		}
		defer f.Close()
		r = f
	}
	snap, err := state.ReadSnapshot(r)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return snap, nil
}

func newStateImportCmd() *cobra.Command {
	var sf storeFlags
	var in string
	var force bool
	cmd := &cobra.Command{
		Use:   "import --in FILE [--force]",
		Short: "Write a snapshot into a prefix (which must be empty unless --force)",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			snap, err := readSnapshotFile(cmd, in)
			if err != nil {
				return &exitError{code: 2, err: err}
			}
			if err := snap.Validate(); err != nil {
				return &exitError{code: 2, err: fmt.Errorf("%s: %w", in, err)}
			}
			c, err := sf.open(cmd)
			if err != nil {
				return err
			}
			defer c.Close()
			if err := c.store.ImportWith(cmd.Context(), snap, state.ImportOptions{Force: force}); err != nil {
				if errors.Is(err, state.ErrNotEmpty) {
					return &exitError{code: 3, err: err}
				}
				return err
			}
			fmt.Fprintf(cmd.OutOrStdout(), "imported %d experiments and %d resume offsets into prefix %q (digest %s)\n",
				len(snap.Experiments), len(snap.Resume), c.store.Options().Prefix, state.Digest(snap))
			return nil
		},
	}
	sf.bind(cmd)
	cmd.Flags().StringVar(&in, "in", "", "snapshot `file` written by export (- for standard input) (required)")
	cmd.Flags().BoolVar(&force, "force", false, "import into a prefix that holds state, replacing the snapshot's experiments")
	_ = cmd.MarkFlagRequired("in")
	return cmd
}

func newStateDigestCmd() *cobra.Command {
	var sf storeFlags
	var in string
	cmd := &cobra.Command{
		Use:   "digest [--in FILE]",
		Short: "Print the SHA-256 digest of the logical state of a prefix or a snapshot file",
		Long: `digest prints a SHA-256 over a canonical encoding of the logical state
(experiments, arms and partitions sorted; arms re-keyed to canonical buckets;
allocations as canonical JSON). Two prefixes, or a prefix and a snapshot file,
hold the same state exactly when their digests are equal; join buffers are not
covered.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			var snap *state.Snapshot
			if in != "" {
				s, err := readSnapshotFile(cmd, in)
				if err != nil {
					return &exitError{code: 2, err: err}
				}
				snap = s
			} else {
				c, err := sf.open(cmd)
				if err != nil {
					return err
				}
				defer c.Close()
				if snap, err = c.store.ExportExperiments(cmd.Context()); err != nil {
					return err
				}
			}
			fmt.Fprintln(cmd.OutOrStdout(), state.Digest(snap))
			return nil
		},
	}
	sf.bind(cmd)
	cmd.Flags().StringVar(&in, "in", "", "snapshot `file` to digest instead of the live prefix (- for standard input)")
	return cmd
}

func newStateDiffCmd() *cobra.Command {
	var sf storeFlags
	var against string
	cmd := &cobra.Command{
		Use:   "diff (--against PREFIX | FILE | FILE_A FILE_B)",
		Short: "List the arms (and experiment settings) that differ between two states",
		Long: `diff compares two states and lists every arm that is missing on one side or
whose counts differ, and every experiment whose layout, watermark, applied
offsets or allocation differ. The sides are, by arguments:

  ripen state diff --prefix A --against B   two live prefixes of one Redis
  ripen state diff FILE                     a snapshot file (a) and the live --prefix (b)
  ripen state diff FILE_A FILE_B            two snapshot files

It exits with status 1 when the states differ.`,
		Args: cobra.MaximumNArgs(2),
		RunE: func(cmd *cobra.Command, args []string) error {
			if (len(args) == 0) == (against == "") {
				return &exitError{code: 2, err: errors.New("state diff: give --against PREFIX, or one or two snapshot files")}
			}
			var a, b *state.Snapshot
			for i, path := range args {
				s, err := readSnapshotFile(cmd, path)
				if err != nil {
					return &exitError{code: 2, err: err}
				}
				if i == 0 {
					a = s
				} else {
					b = s
				}
			}
			if b == nil {
				c, err := sf.open(cmd)
				if err != nil {
					return err
				}
				defer c.Close()
				live, err := c.store.ExportExperiments(cmd.Context())
				if err != nil {
					return err
				}
				if a != nil {
					b = live
				} else {
					other, err := state.New(c.rdb, state.Options{Prefix: against})
					if err != nil {
						return &exitError{code: 2, err: err}
					}
					a = live
					if b, err = other.ExportExperiments(cmd.Context()); err != nil {
						return err
					}
				}
			}
			diffs := state.Diff(a, b)
			w := cmd.OutOrStdout()
			if len(diffs) == 0 {
				fmt.Fprintf(w, "no differences (digest %s)\n", state.Digest(a))
				return nil
			}
			fmt.Fprintf(w, "a: %s  digest %s\nb: %s  digest %s\n\n", snapshotLabel(a), state.Digest(a), snapshotLabel(b), state.Digest(b))
			writeDiffTable(w, diffs)
			return &exitError{code: 1, err: fmt.Errorf("state diff: %d differences", len(diffs))}
		},
	}
	sf.bind(cmd)
	cmd.Flags().StringVar(&against, "against", "", "second `prefix` in the same Redis to compare --prefix with")
	return cmd
}

func snapshotLabel(s *state.Snapshot) string {
	return fmt.Sprintf("prefix %q, %d experiments", s.Prefix, len(s.Experiments))
}

// writeDiffTable prints one line per difference.
func writeDiffTable(w io.Writer, diffs []state.ArmDiff) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "EXPERIMENT\tARM\tKIND\tFIELDS\tCLICKS A\tCLICKS B\tCONVERSIONS A\tCONVERSIONS B")
	for _, d := range diffs {
		exp, arm := d.Experiment, d.Arm
		if exp == "" {
			exp = "(partitions)"
		}
		if arm == "" {
			arm = "-"
		}
		counts := "\t\t\t"
		if d.Arm != "" {
			counts = fmt.Sprintf("%d\t%d\t%d\t%d", d.A.Clicks, d.B.Clicks, d.A.Conversions, d.B.Conversions)
		}
		fields := strings.Join(d.Fields, ",")
		if fields == "" {
			fields = "-"
		}
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\n", exp, arm, d.Kind, fields, counts)
	}
	_ = tw.Flush()
}
