package main

import (
	"bytes"
	"context"
	_ "embed"
	"errors"
	"fmt"
	"io"
	"math"
	"net"
	"path/filepath"
	"time"

	"github.com/spf13/cobra"
	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"

	"ripen/console"
	"ripen/consumer"
	"ripen/consumer/closedloop"
	"ripen/estimator/sim"
)

// demoScenarioYAML is the built-in scenario of `ripen demo`.
//
//go:embed demo_scenario.yaml
var demoScenarioYAML []byte

// demoShortHorizon is the simulated span of --short.
const demoShortHorizon = 4 * 24 * time.Hour

// demoFlags are the options of `ripen demo`.
type demoFlags struct {
	short       bool
	report      string
	seed        uint64
	store       string
	days        float64
	logLvl      string
	http        string
	keepServing bool
}

func newDemoCmd() *cobra.Command {
	var f demoFlags
	cmd := &cobra.Command{
		Use:   "demo [--short] [--report DIR] [--seed N] [--http ADDR] [--keep-serving]",
		Short: "Run the service on a simulated shop, closed-loop, and write a report",
		Long: `demo runs the real ` + "`ripen run`" + ` pipeline against an in-process
Kafka-compatible broker and a local Redis (a redis-server from PATH on a free
loopback port, or an embedded Redis-compatible store when there is none), and
feeds it two weeks of simulated traffic of an invented shop in under a minute.
The traffic generator follows the weights the service publishes: each chunk
of clicks is split between the arms by the latest allocation, and the next
chunk waits until the service has caught up and refitted.

While it runs, the service's web console is served on --http (a free
loopback port by default; the address is printed), and the terminal shows
each arm's weight and its observed and eventual conversion rate. At the end
DIR/index.html holds the charts and DIR/allocations.jsonl and
DIR/allocations.csv every allocation published; --keep-serving keeps the
console open until interrupted.`,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			return runDemo(cmd.Context(), cmd.OutOrStdout(), cmd.ErrOrStderr(), f)
		},
	}
	fl := cmd.Flags()
	fl.BoolVar(&f.short, "short", false, "simulate a few days instead of two weeks")
	fl.StringVar(&f.report, "report", "ripen-demo-report", "directory for the report (index.html, allocations.jsonl, allocations.csv)")
	fl.Uint64Var(&f.seed, "seed", 0, "seed of the simulated traffic (0: the scenario's)")
	fl.StringVar(&f.store, "store", closedloop.StoreAuto, "state store: auto, redis-server or embedded")
	fl.Float64Var(&f.days, "days", 0, "simulated days (0: the scenario's, or a few with --short)")
	fl.StringVar(&f.logLvl, "log-level", "error", "level of the service's logs on stderr: debug, info, warn or error")
	fl.StringVar(&f.http, "http", "127.0.0.1:0", "listen `address` of the web console (port 0: a free one); loopback only")
	fl.BoolVar(&f.keepServing, "keep-serving", false, "keep the service and its console running after the run, until interrupted")
	_ = fl.MarkHidden("store")
	_ = fl.MarkHidden("days")
	return cmd
}

// demoScenario returns the built-in scenario with the flags applied.
func demoScenario(f demoFlags) (sim.Scenario, error) {
	sc, err := sim.ParseScenario(bytes.NewReader(demoScenarioYAML))
	if err != nil {
		return sim.Scenario{}, fmt.Errorf("demo scenario: %w", err)
	}
	switch {
	case f.days < 0 || math.IsNaN(f.days) || f.days > 60:
		return sim.Scenario{}, fmt.Errorf("--days %v: want 0 to 60", f.days)
	case f.days > 0:
		sc.Horizon = sim.Duration(time.Duration(f.days * float64(24*time.Hour)))
	case f.short:
		sc.Horizon = sim.Duration(demoShortHorizon)
	}
	if f.seed != 0 {
		sc.Seed = f.seed
	}
	if err := sc.Validate(); err != nil {
		return sim.Scenario{}, fmt.Errorf("demo scenario: %w", err)
	}
	return *sc, nil
}

func runDemo(ctx context.Context, stdout, stderr io.Writer, f demoFlags) error {
	sc, err := demoScenario(f)
	if err != nil {
		return &exitError{code: 2, err: err}
	}
	level, err := zapcore.ParseLevel(f.logLvl)
	if err != nil {
		return &exitError{code: 2, err: fmt.Errorf("--log-level: %w", err)}
	}
	if !consumer.IsLoopback(f.http) {
		return &exitError{code: 2, err: fmt.Errorf("--http %s: the demo's console has no credential and listens on loopback only", f.http)}
	}
	var lc net.ListenConfig
	ln, err := lc.Listen(ctx, "tcp", f.http)
	if err != nil {
		return &exitError{code: 2, err: fmt.Errorf("--http: %w", err)}
	}
	defer ln.Close()
	store, err := closedloop.StartStore(ctx, f.store)
	if err != nil {
		return err
	}
	defer store.Close()
	log := demoLogger(stderr, level)
	loop, err := closedloop.Start(ctx, closedloop.Options{Scenario: sc, Redis: store.Client, Logger: log})
	if err != nil {
		return err
	}
	defer loop.Close()

	// The console, served as `ripen run` serves it.
	h, err := console.NewHandler(console.Options{Source: loop.Service(), Metrics: loop.Registry(), Logger: log})
	if err != nil {
		return err
	}
	serveCtx, stopServe := context.WithCancel(context.WithoutCancel(ctx))
	served := make(chan error, 1)
	go func() {
		served <- consumer.ServeListener(serveCtx, ln, consumer.NewServiceHandler(loop.Service(), loop.Registry(), log, consumer.HTTPOptions{Console: h}), consumer.DefaultHTTPShutdownTimeout)
	}()
	defer func() { stopServe(); <-served }()
	consoleURL := "http://" + ln.Addr().String() + "/"

	view := closedloop.NewTerminalView(stdout, sc, store.Name)
	view.Header("console: " + consoleURL)
	res, err := loop.Drive(ctx, func(t closedloop.Tick) { view.Update(t, "console: "+consoleURL) })
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	if err := writeDemoReport(ctx, f.report, sc, loop, res); err != nil {
		return err
	}
	view.Summary(res, filepath.Join(f.report, "index.html"))
	if f.keepServing {
		fmt.Fprintf(stdout, "console: %s (serving until interrupted)\n", consoleURL)
		select {
		case <-ctx.Done():
		case err := <-served:
			served <- err
		}
	}
	if err := loop.Close(); err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	return nil
}

// demoLogger logs the service's messages from level up to w (by default
// errors only, so that a failing refit is seen; the rest of its logging
// would drown the live view).
func demoLogger(w io.Writer, level zapcore.Level) *zap.Logger {
	enc := zap.NewDevelopmentEncoderConfig()
	core := zapcore.NewCore(zapcore.NewConsoleEncoder(enc), zapcore.Lock(zapcore.AddSync(w)), level)
	return zap.New(core)
}

// writeDemoReport writes the experiment's page, with the simulated truth,
// and the allocations read to dir.
func writeDemoReport(ctx context.Context, dir string, sc sim.Scenario, loop *closedloop.Loop, res *closedloop.Result) error {
	ex, err := loop.Store().Load(ctx, sc.Name)
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	hist, err := console.ParseAllocations(res.Raw)
	if err != nil {
		return fmt.Errorf("demo: %w", err)
	}
	if len(hist) == 0 {
		return errors.New("demo: no allocation read")
	}
	truth, err := console.ScenarioTruth(sc)
	if err != nil {
		return fmt.Errorf("demo report: %w", err)
	}
	v := console.View{
		ID:    sc.Name,
		Title: "ripen demo: " + sc.Name,
		Notes: []string{sc.Description, fmt.Sprintf("Simulated traffic: %g clicks per hour on average over %s, split by the published weights; refit every %s; attribution window %s.",
			sc.ClicksPerHour, consumer.FormatDuration(sc.Horizon.D()), consumer.FormatDuration(sc.UpdateInterval.D()), consumer.FormatDuration(sc.Window.D()))},
		History: hist,
		State:   ex,
		Origin:  sim.Start,
		Truth:   truth,
	}
	if err := console.WriteExperimentReport(dir, v, res.Raw); err != nil {
		return fmt.Errorf("--report: %w", err)
	}
	return nil
}
