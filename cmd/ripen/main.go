// Command ripen estimates eventual conversion rates of experiment arms whose
// conversions arrive long after the click, and turns them into traffic
// weights. Subcommands wire flags to the packages that do the work:
// estimator (statistics), state (Redis) and consumer (events and Kafka).
package main

import (
	"context"
	"errors"
	"fmt"
	"os"
	"os/signal"
	"syscall"

	"github.com/spf13/cobra"
)

// exitError carries a process exit code out of a subcommand.
type exitError struct {
	code int
	err  error
}

func (e *exitError) Error() string { return e.err.Error() }
func (e *exitError) Unwrap() error { return e.err }

func newRootCmd() *cobra.Command {
	root := &cobra.Command{
		Use:           "ripen",
		Short:         "Delay-aware traffic allocation for multi-arm experiments",
		SilenceUsage:  true,
		SilenceErrors: true,
	}
	root.AddCommand(newFitCmd(), newSimulateCmd(), newCalibrateCmd(), newRunCmd(), newDevbrokerCmd(), newStateCmd(), newInspectCmd(),
		newBenchCmd(), newDemoCmd(), newReportCmd(), newReplayCmd())
	return root
}

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if err := newRootCmd().ExecuteContext(ctx); err != nil {
		fmt.Fprintln(os.Stderr, "ripen:", err)
		var ee *exitError
		if errors.As(err, &ee) {
			os.Exit(ee.code)
		}
		os.Exit(1)
	}
}
