package report

import (
	"bytes"
	"embed"
	"fmt"
	"html/template"
	"io"
	"io/fs"
	"os"
	"path/filepath"
)

// assets holds the page script and style sheet, and uPlot
// (https://github.com/leeoniya/uPlot, MIT licence in assets/uplot/LICENSE),
// shipped inside the binary: pages make no request beyond their own site.
//
//go:embed assets
var assets embed.FS

// Asset paths under Assets.
const (
	scriptPath   = "assets/ripen.js"
	stylePath    = "assets/ripen.css"
	uplotPath    = "assets/uplot/uPlot.iife.min.js"
	uplotCSSPath = "assets/uplot/uPlot.min.css"
	uplotLicense = "assets/uplot/LICENSE"
)

// Assets returns the files a live page loads, under "assets/": the page
// script, its style sheet, uPlot and uPlot's licence.
func Assets() fs.FS { return assets }

func mustRead(name string) []byte {
	b, err := assets.ReadFile(name)
	if err != nil {
		panic(fmt.Sprintf("report: embedded asset %s: %v", name, err))
	}
	return b
}

// shellData fills the page template. A written report has everything
// inline; a live console page links the assets and fetches its data.
type shellData struct {
	Title string
	Nav   []Link
	// Inline: a self-contained file.
	Inline              bool
	UPlotCSS, CSS       template.CSS
	UPlotJS, JS, JSON   template.JS
	AssetBase           string
	DataURL             string
	RefreshSeconds      int
	NoScript, Generator string
}

var shell = template.Must(template.New("page").Parse(`<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="{{.Generator}}">
<link rel="icon" href="data:,">
<title>{{.Title}}</title>
{{if .Inline}}<style>{{.UPlotCSS}}
{{.CSS}}</style>
{{else}}<link rel="stylesheet" href="{{.AssetBase}}assets/uplot/uPlot.min.css">
<link rel="stylesheet" href="{{.AssetBase}}assets/ripen.css">
{{end}}</head>
<body>
<header class="top"><span class="brand">ripen</span>{{if .Nav}}<nav>{{range .Nav}}<a href="{{.Href}}">{{.Text}}</a>{{end}}</nav>{{end}}<span id="live" class="live"></span></header>
<main id="page"{{if .DataURL}} data-src="{{.DataURL}}" data-refresh="{{.RefreshSeconds}}"{{end}}><noscript>{{.NoScript}}</noscript></main>
{{if .Inline}}<script type="application/json" id="page-data">{{.JSON}}</script>
<script>{{.UPlotJS}}</script>
<script>{{.JS}}</script>
{{else}}<script src="{{.AssetBase}}assets/uplot/uPlot.iife.min.js"></script>
<script src="{{.AssetBase}}assets/ripen.js"></script>
{{end}}</body>
</html>
`))

const noScript = "This page draws its tables and charts with JavaScript; turn it on to see them."

// WriteHTML renders p as one self-contained HTML document: the page's
// JSON, the page script and uPlot inline, no request to anywhere.
func WriteHTML(w io.Writer, p Page) error {
	data, err := MarshalPage(p)
	if err != nil {
		return fmt.Errorf("report: encode page: %w", err)
	}
	d := shellData{
		Title: p.Title, Inline: true,
		UPlotCSS: template.CSS(mustRead(uplotCSSPath)), CSS: template.CSS(mustRead(stylePath)),
		// The scripts are this package's own files (checked by a test to
		// hold no "</script"); the JSON escapes <, > and &.
		UPlotJS: template.JS(mustRead(uplotPath)), JS: template.JS(mustRead(scriptPath)), JSON: template.JS(data),
		NoScript: noScript, Generator: "ripen",
	}
	if err := shell.Execute(w, d); err != nil {
		return fmt.Errorf("report: render page: %w", err)
	}
	return nil
}

// Shell is a live page: its frame, and the address of its data, which the
// page script fetches and refreshes.
type Shell struct {
	// Title is shown until the data arrive.
	Title string
	// Nav links the site's pages.
	Nav []Link
	// AssetBase is the path the "assets/" directory is served under,
	// ending in "/". Default: "/".
	AssetBase string
	// DataURL is the site-relative address of the page's JSON.
	DataURL string
	// RefreshSeconds is the refresh period; 0 loads once.
	RefreshSeconds int
}

// WriteShell renders a live page that loads its assets from AssetBase and
// its data from DataURL.
func WriteShell(w io.Writer, s Shell) error {
	if s.AssetBase == "" {
		s.AssetBase = "/"
	}
	d := shellData{Title: s.Title, Nav: s.Nav, AssetBase: s.AssetBase, DataURL: s.DataURL, RefreshSeconds: s.RefreshSeconds, NoScript: noScript, Generator: "ripen"}
	if err := shell.Execute(w, d); err != nil {
		return fmt.Errorf("report: render page: %w", err)
	}
	return nil
}

// WriteDir writes p to dir/index.html, creating dir if needed, with
// uPlot's licence beside it (the page carries uPlot inline).
func WriteDir(dir string, p Page) error {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return fmt.Errorf("report: %w", err)
	}
	var buf bytes.Buffer
	if err := WriteHTML(&buf, p); err != nil {
		return err
	}
	if err := os.WriteFile(filepath.Join(dir, "index.html"), buf.Bytes(), 0o644); err != nil {
		return fmt.Errorf("report: %w", err)
	}
	if err := os.WriteFile(filepath.Join(dir, "uPlot-LICENSE.txt"), mustRead(uplotLicense), 0o644); err != nil {
		return fmt.Errorf("report: %w", err)
	}
	return nil
}
