package main

import (
	"fmt"
	"os"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/spf13/cobra"
	"go.uber.org/zap"

	"ripen/console"
	"ripen/consumer"
	"ripen/state"
)

// orphanTTLSlack is added to the event-time orphan TTL to give the
// wall-clock lifetime of a parked conversion in Redis, a safety net behind
// the event-time sweep.
const orphanTTLSlack = 6 * time.Hour

func newRunCmd() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "run [flags]",
		Short: "Consume clicks and conversions from Kafka, keep arm states in Redis and publish traffic weights",
		Long: `run joins the click and conversion topics in a consumer group, joins each
conversion to its click, applies per-experiment deltas to Redis together with
the Kafka offsets they cover, refits experiments on event-time ticks and
publishes their weights to the allocation topic. Bad events go to the
dead-letter topic with a reason. /metrics, /livez, /readyz, /v1 and the
read-only web console (at /) are served on the HTTP address; http_auth
protects the console and /v1 with a bearer token or basic auth, and must be
set when the address is not loopback (or allow_unauthenticated: true).

Settings come from the YAML file (--config or RIPEN_CONFIG), then RIPEN_*
environment variables, then flags. SIGTERM or SIGINT stops fetching, flushes,
commits and exits within shutdown_timeout.`,
		Args: cobra.NoArgs,
	}
	flags := consumer.BindFlags(cmd.Flags())
	resetFencing := cmd.Flags().Bool("reset-fencing", false,
		"raise the fencing base above every stored generation once (after the consumer group was deleted and recreated); "+
			"a still-running instance of the old group could then write stale deltas")
	cmd.RunE = func(cmd *cobra.Command, _ []string) error {
		cfg, err := consumer.LoadConfig("", os.LookupEnv, flags)
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		cfg.Pipeline.ResetFencing = *resetFencing
		log, err := consumer.NewLogger(cfg.Log)
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		defer func() { _ = log.Sync() }()
		rdb, err := consumer.NewRedisClient(cfg.Redis)
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		defer rdb.Close()
		store, err := state.New(rdb, state.Options{
			Prefix:           cfg.Redis.Prefix,
			OrphanTTL:        cfg.Pipeline.OrphanTTL + orphanTTLSlack,
			MaxParkedOrphans: cfg.Limits.MaxOrphansPerPartition,
		})
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		reg := prometheus.NewRegistry()
		metrics := consumer.NewMetrics(reg)
		svc, err := consumer.New(cfg, consumer.Deps{Store: store, Logger: log, Metrics: metrics})
		if err != nil {
			return &exitError{code: 2, err: err}
		}
		log.Info("starting", zap.Any("config", cfg.Redacted()))
		if !cfg.HTTPAuth.Enabled() && !consumer.IsLoopback(cfg.HTTP) {
			log.Warn("the web console and /v1 are served without a credential beyond loopback (http_auth.allow_unauthenticated)", zap.String("http", cfg.HTTP))
		}
		web, err := console.NewHandler(console.Options{Source: svc, Metrics: reg, Logger: log})
		if err != nil {
			return err
		}
		handler := consumer.NewServiceHandler(svc, reg, log, consumer.HTTPOptions{Auth: cfg.HTTPAuth, Console: web})

		ctx := cmd.Context()
		var wg sync.WaitGroup
		httpErr := make(chan error, 1)
		wg.Add(1)
		go func() {
			defer wg.Done()
			httpErr <- consumer.ServeHTTP(ctx, cfg.HTTP, handler)
		}()
		runErr := svc.Run(ctx)
		wg.Wait()
		if err := <-httpErr; err != nil && runErr == nil {
			runErr = err
		}
		if runErr != nil {
			return fmt.Errorf("run: %w", runErr)
		}
		return nil
	}
	return cmd
}
