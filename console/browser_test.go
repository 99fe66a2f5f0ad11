package console_test

import (
	"context"
	"fmt"
	"net"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/cdproto/page"
	"github.com/chromedp/chromedp"
	"go.uber.org/zap"

	"ripen/console"
	"ripen/consumer"
	"ripen/consumer/closedloop"
	"ripen/estimator/sim"
	"ripen/state/redistest"
)

// xssArm and xssExperiment are names a hostile producer could send; the
// console must show them as text.
const (
	xssArm        = "<img src=x onerror=alert(1)>"
	xssExperiment = `"><svg onload=alert(2)>`
)

// browserScenario is an invented one: Tallowby Candles tests three
// product-page headlines for a day, one of them named by a hostile
// producer.
func browserScenario(t *testing.T) sim.Scenario {
	t.Helper()
	yaml := fmt.Sprintf(`
name: %q
horizon: 1d
clicks_per_hour: 900
update_interval: 2h
window: 2d
fit_family: exponential
arms:
  - name: beeswax-glow
    cvr: 0.08
    delay: {exponential: {mean: 3h}}
  - name: %q
    cvr: 0.05
    delay: {exponential: {mean: 1h}}
  - name: hand-poured
    cvr: 0.06
    delay: {exponential: {mean: 6h}}
seed: 5
`, xssExperiment, xssArm)
	sc, err := sim.ParseScenario(strings.NewReader(yaml))
	if err != nil {
		t.Fatal(err)
	}
	return *sc
}

// chromium returns the browser to drive, skipping the test when there is
// none (and failing it under CI, which installs Debian's chromium).
func chromium(t *testing.T) string {
	t.Helper()
	for _, name := range []string{os.Getenv("RIPEN_CHROMIUM"), "chromium", "chromium-browser", "google-chrome"} {
		if name == "" {
			continue
		}
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("CI") != "" {
		t.Fatal("no chromium on PATH and CI is set (apt-get install -y chromium)")
	}
	t.Skip("no chromium on PATH")
	return ""
}

// browserLog collects what the page reports: console errors, uncaught
// exceptions, browser log errors (CSP violations, failed loads) and
// dialogs (an alert means injected markup ran).
type browserLog struct {
	mu      sync.Mutex
	errors  []string
	dialogs []string
}

func (b *browserLog) add(list *[]string, s string) {
	b.mu.Lock()
	*list = append(*list, s)
	b.mu.Unlock()
}

func (b *browserLog) check(t *testing.T, where string) {
	t.Helper()
	b.mu.Lock()
	defer b.mu.Unlock()
	for _, e := range b.errors {
		t.Errorf("%s: browser reported an error: %s", where, e)
	}
	for _, d := range b.dialogs {
		t.Errorf("%s: a dialog opened (injected script ran): %s", where, d)
	}
	b.errors, b.dialogs = nil, nil
}

// TestConsoleInBrowser runs the service on simulated traffic (in-process
// broker, real redis-server), serves its console, and loads the list and
// the experiment page in headless Chromium at a laptop's and a phone's
// size: the charts draw, the page updates itself, the browser logs no
// error, and the hostile names stay text.
func TestConsoleInBrowser(t *testing.T) {
	exe := chromium(t)
	srv := redistest.Start(t)
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()

	sc := browserScenario(t)
	loop, err := closedloop.Start(ctx, closedloop.Options{Scenario: sc, Redis: srv.Client(), Prefix: "web"})
	if err != nil {
		t.Fatal(err)
	}
	defer func() {
		if err := loop.Close(); err != nil {
			t.Error(err)
		}
	}()
	if _, err := loop.Drive(ctx, nil); err != nil {
		t.Fatal(err)
	}
	h, err := console.NewHandler(console.Options{Source: loop.Service(), Metrics: loop.Registry(), Logger: zap.NewNop(), Refresh: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	serveCtx, stopServe := context.WithCancel(ctx)
	served := make(chan error, 1)
	go func() {
		served <- consumer.ServeListener(serveCtx, ln, consumer.NewServiceHandler(loop.Service(), loop.Registry(), nil, consumer.HTTPOptions{Console: h}), time.Second)
	}()
	defer func() { stopServe(); <-served }()
	base := "http://" + ln.Addr().String()

	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(exe), chromedp.Headless, chromedp.NoSandbox, chromedp.DisableGPU, chromedp.NoFirstRun, chromedp.NoDefaultBrowserCheck,
		chromedp.Flag("disable-quic", true), chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true), chromedp.Flag("disable-sync", true),
		chromedp.Flag("hide-scrollbars", true), chromedp.UserDataDir(t.TempDir()),
	}
	actx, cancelAlloc := chromedp.NewExecAllocator(ctx, opts...)
	defer cancelAlloc()
	var blog browserLog
	bctx, cancelBrowser := chromedp.NewContext(actx, chromedp.WithListener(func(ev any) {
		if e, ok := ev.(*page.EventJavascriptDialogOpening); ok {
			blog.add(&blog.dialogs, e.Message)
		}
	}))
	defer cancelBrowser()
	if err := chromedp.Do(bctx); err != nil { // starts the browser
		t.Fatal(err)
	}
	messages := chromedp.Console(bctx)
	go func() {
		for m, err := range messages {
			if err != nil {
				return
			}
			if m.Type == chromedp.ConsoleError || m.Type == chromedp.ConsoleWarning || m.IsException() {
				blog.add(&blog.errors, fmt.Sprintf("%s (%s)", m, m.URL))
			}
		}
	}()
	eval := func(expr string) string {
		t.Helper()
		v, err := chromedp.Run(bctx, chromedp.Evaluate[string](expr))
		if err != nil {
			t.Fatalf("%s: %v", expr, err)
		}
		return v
	}
	const hostileProbe = `String(document.querySelectorAll("img, svg, iframe, [onerror], [onload]").length)`

	shots := os.Getenv("RIPEN_SCREENSHOT_DIR")
	if shots == "" {
		shots = t.TempDir()
	}
	expURL := base + "/experiment?id=" + url.QueryEscape(sc.Name)
	for _, size := range []struct {
		name          string
		width, height int64
		mobile        bool
	}{{"laptop", 1280, 800, false}, {"phone", 390, 844, true}} {
		t.Run(size.name, func(t *testing.T) {
			viewport := chromedp.EmulateViewport(size.width, size.height, chromedp.EmulateScale(1))
			if size.mobile {
				viewport = chromedp.EmulateViewport(size.width, size.height, chromedp.EmulateScale(2), chromedp.EmulateMobile)
			}
			// The list.
			if err := chromedp.Do(bctx, viewport, chromedp.Navigate(base+"/"),
				chromedp.WaitVisible(chromedp.CSS(`#table-experiments tbody tr`))); err != nil {
				t.Fatal(err)
			}
			if text := eval(`document.querySelector("#table-experiments tbody").textContent`); !strings.Contains(text, xssExperiment) {
				t.Errorf("list does not show the experiment's name as text: %q", text)
			}
			if n := eval(hostileProbe); n != "0" {
				t.Errorf("list: %s elements made from names", n)
			}
			shot(t, bctx, filepath.Join(shots, "list-"+size.name+".png"))
			// The status filter: the menu offers the statuses present and
			// keeps the choice in the address.
			status := eval(`document.querySelector("#filter-experiments").options[1].value`)
			if err := chromedp.Do(bctx, chromedp.Evaluate[chromedp.Void](`(function () {
				var s = document.querySelector("#filter-experiments");
				s.value = s.options[1].value;
				s.dispatchEvent(new Event("change"));
			})()`)); err != nil {
				t.Fatal(err)
			}
			if _, err := chromedp.Run(bctx, chromedp.Poll[bool](`location.search.indexOf("status=") >= 0 && document.querySelector("#filter-experiments").value !== ""`,
				chromedp.WithPollingTimeout(10*time.Second))); err != nil {
				t.Fatalf("filter: %v", err)
			}
			if n := eval(`String(document.querySelectorAll("#table-experiments tbody tr").length)`); n != "1" || status == "" {
				t.Errorf("filtered by %q: %s rows, want the one experiment", status, n)
			}
			blog.check(t, "list")

			// The experiment page: every chart drew lines in the arms'
			// colours, and the page refreshes itself without a reload.
			if err := chromedp.Do(bctx, chromedp.Navigate(expURL),
				chromedp.WaitVisible(chromedp.CSS(`#chart-delay-model canvas`)),
				chromedp.Evaluate[chromedp.Void](`window.__stillHere = true`)); err != nil {
				t.Fatal(err)
			}
			if _, err := chromedp.Run(bctx, chromedp.Poll[bool](`Number(document.getElementById("page").dataset.rendered) >= 2`,
				chromedp.WithPollingTimeout(20*time.Second))); err != nil {
				t.Fatalf("the page did not refresh itself: %v", err)
			}
			if eval(`String(window.__stillHere === true)`) != "true" {
				t.Error("the page reloaded instead of updating itself")
			}
			charts, err := chromedp.Run(bctx, chromedp.Evaluate[[]chartInfo](chartProbe))
			if err != nil {
				t.Fatal(err)
			}
			ids := map[string]bool{}
			for _, c := range charts {
				ids[c.ID] = true
				if c.Coloured < 150 {
					t.Errorf("chart %s drew %d coloured pixels; want its lines", c.ID, c.Coloured)
				}
				if c.Right > float64(size.width)+0.5 {
					t.Errorf("chart %s ends at x=%.0f, beyond the %d px viewport", c.ID, c.Right, size.width)
				}
			}
			for _, id := range []string{"chart-traffic", "chart-pbest", "chart-cvr", "chart-delay-cdf", "chart-delay-model"} {
				if !ids[id] {
					t.Errorf("no chart %s (got %v)", id, charts)
				}
			}
			table := eval(`document.querySelector("#table-arms tbody").textContent`)
			legend := eval(`document.querySelector("#chart-cvr .legend").textContent`)
			if !strings.Contains(table, xssArm) || !strings.Contains(legend, xssArm) {
				t.Errorf("the hostile arm's name is not shown as text: table %q, legend %q", table, legend)
			}
			if n := eval(hostileProbe); n != "0" {
				t.Errorf("experiment page: %s elements made from names", n)
			}
			// Nothing was fetched from anywhere but the console.
			if others := eval(`JSON.stringify(performance.getEntriesByType("resource").map(function (e) { return e.name; }).filter(function (u) { return u.indexOf(location.origin + "/") !== 0; }))`); others != "[]" {
				t.Errorf("requests beyond the console: %s", others)
			}
			shot(t, bctx, filepath.Join(shots, "experiment-"+size.name+".png"))
			blog.check(t, "experiment")

			// The service page.
			if err := chromedp.Do(bctx, chromedp.Navigate(base+"/service"), chromedp.WaitVisible(chromedp.CSS(`#table-partitions`))); err != nil {
				t.Fatal(err)
			}
			if text := eval(`document.querySelector(".facts").textContent`); !strings.Contains(text, "Redis") || !strings.Contains(text, "watermark") {
				t.Errorf("service facts %q", text)
			}
			blog.check(t, "service")
		})
	}
	t.Logf("screenshots in %s", shots)
}

// chartInfo is what chartProbe reports of one chart.
type chartInfo struct {
	ID       string  `json:"id"`
	Coloured int     `json:"coloured"`
	Right    float64 `json:"right"`
}

// chartProbe counts, per chart, the canvas pixels that are neither
// transparent nor grey (grid, axes and text are grey; the arms' lines are
// coloured), and the chart's right edge.
const chartProbe = `Array.from(document.querySelectorAll("figure.chart")).map(function (f) {
  var c = f.querySelector("canvas"), n = 0;
  if (c) {
    var d = c.getContext("2d").getImageData(0, 0, c.width, c.height).data;
    for (var i = 0; i < d.length; i += 4) {
      var r = d[i], g = d[i + 1], b = d[i + 2];
      if (d[i + 3] > 0 && (Math.abs(r - g) > 40 || Math.abs(g - b) > 40 || Math.abs(r - b) > 40)) n++;
    }
  }
  return {id: f.id, coloured: n, right: c ? c.getBoundingClientRect().right : 0};
})`

// shot saves a screenshot of the viewport.
func shot(t *testing.T, ctx context.Context, path string) {
	t.Helper()
	png, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, png, 0o644); err != nil {
		t.Fatal(err)
	}
}
