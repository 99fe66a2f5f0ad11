// Page script of Ripen's console and written reports: draws a page
// described as JSON (see package report) with plain DOM calls and uPlot.
// Every text from the data is placed with textContent, never parsed as
// markup. A page either carries its JSON inline (#page-data) or names an
// address to fetch it from (main[data-src]) and refreshes itself.
(function () {
  "use strict";

  // Okabe & Ito (2008), "Color Universal Design": distinguishable with
  // the common forms of colour blindness. Yellow comes last (weak on
  // white); past eight arms the colours repeat.
  var PALETTE = ["#0072B2", "#E69F00", "#009E73", "#CC79A7", "#D55E00", "#56B4E9", "#000000", "#C9B400"];
  var DASH = { dashed: [7, 4], dotted: [2, 3] };
  var HOUR_STEPS = [0.25, 0.5, 1, 2, 3, 6, 12, 24, 48, 72, 168, 336, 672, 1344, 2688, 5376];

  function colour(group) {
    var n = PALETTE.length;
    return PALETTE[((group % n) + n) % n];
  }

  function alpha(hex, a) {
    var v = parseInt(hex.slice(1), 16);
    return "rgba(" + ((v >> 16) & 255) + "," + ((v >> 8) & 255) + "," + (v & 255) + "," + a + ")";
  }

  function el(tag, cls, text) {
    var e = document.createElement(tag);
    if (cls) e.className = cls;
    if (text !== undefined && text !== null) e.textContent = String(text);
    return e;
  }

  // safeHref accepts only addresses of this site or page.
  function safeHref(h) {
    return typeof h === "string" && /^(\/(?!\/)|\?|#|\.\/)/.test(h) ? h : null;
  }

  function fmtNum(v, digits) {
    if (v === null || v === undefined || !isFinite(v)) return "–";
    return Number(v.toFixed(digits)).toString();
  }

  function fmtPercent(v, step) {
    var d = step < 0.0001 ? 3 : step < 0.001 ? 2 : step < 0.01 ? 1 : 0;
    return fmtNum(v * 100, d) + "%";
  }

  function fmtHours(h, step) {
    if (step >= 12 || Math.abs(h) >= 96) return fmtNum(h / 24, 2) + " d";
    if (step < 1) return fmtNum(h * 60, 0) + " min";
    return fmtNum(h, 1) + " h";
  }

  // hourSplits ticks an hour axis at round hours or days, about one tick
  // per 75 CSS pixels.
  function hourSplits(u, axisIdx, min, max) {
    var width = u.bbox.width / (window.devicePixelRatio || 1);
    var want = Math.max(3, Math.floor(width / 75));
    var span = max - min, step = HOUR_STEPS[HOUR_STEPS.length - 1];
    for (var i = 0; i < HOUR_STEPS.length; i++) {
      if (span / HOUR_STEPS[i] <= want) { step = HOUR_STEPS[i]; break; }
    }
    u._ripenStep = step;
    var out = [];
    for (var t = Math.ceil(min / step - 1e-9) * step; t <= max + 1e-9; t += step) out.push(t);
    return out;
  }

  function axisValues(unit) {
    if (unit === "hours") {
      return function (u, vals) { var s = u._ripenStep || 1; return vals.map(function (v) { return fmtHours(v, s); }); };
    }
    if (unit === "percent") {
      return function (u, vals) {
        var s = vals.length > 1 ? Math.abs(vals[1] - vals[0]) : 0.01;
        return vals.map(function (v) { return fmtPercent(v, s); });
      };
    }
    return function (u, vals) {
      var s = vals.length > 1 ? Math.abs(vals[1] - vals[0]) : 1;
      var d = s >= 1 ? 0 : Math.min(6, Math.ceil(-Math.log10(s)));
      return vals.map(function (v) { return fmtNum(v, d); });
    };
  }

  function readout(unit, v) {
    if (v === null || v === undefined || !isFinite(v)) return "–";
    if (unit === "percent") return fmtNum(v * 100, Math.abs(v) < 0.1 ? 2 : 1) + "%";
    if (unit === "hours") return fmtHours(v, v >= 48 ? 24 : 1);
    return fmtNum(v, Math.abs(v) < 10 ? 3 : 1);
  }

  // chartData aligns every series on one x column (uPlot.join); a series
  // with a band brings its low and high columns after its y.
  function chartData(spec) {
    var tables = [], cols = [];
    (spec.series || []).forEach(function (s, i) {
      var xs = s.x || [], t = [xs, s.y || []];
      var band = !!(s.low && s.high && s.low.length === xs.length && s.high.length === xs.length);
      if (band) t.push(s.low, s.high);
      tables.push(t);
      cols.push({ s: s, band: band });
    });
    if (tables.length === 0) return null;
    return { data: uPlot.join(tables), cols: cols };
  }

  function signature(spec) {
    return JSON.stringify((spec.series || []).map(function (s) {
      return [s.name, s.role || "", s.group, s.style || "", !!s.step, !!(s.low && s.high)];
    })) + "|" + JSON.stringify([spec.x, spec.y]);
  }

  function plotHeight(width) {
    return Math.round(Math.min(320, Math.max(200, width * 0.5)));
  }

  function buildChart(box, spec, joined, width) {
    var series = [{}], bands = [], col = 1;
    var stepped = uPlot.paths.stepped ? uPlot.paths.stepped({ align: 1 }) : null;
    joined.cols.forEach(function (c) {
      var s = c.s, stroke = colour(s.group), n = (s.x || []).length;
      var line = {
        label: s.role ? s.name + " " + s.role : s.name,
        stroke: stroke,
        width: 2,
        dash: DASH[s.style] || undefined,
        points: { show: n > 0 && n < 3, size: 6, fill: stroke },
        spanGaps: false
      };
      if (s.step && stepped) line.paths = stepped;
      series.push(line);
      var yIdx = col++;
      if (c.band) {
        var lo = col++, hi = col++;
        series.push({ label: s.name + " low", stroke: "transparent", width: 0, points: { show: false } });
        series.push({ label: s.name + " high", stroke: "transparent", width: 0, points: { show: false } });
        bands.push({ series: [hi, lo], fill: alpha(stroke, 0.16) });
      }
      c.yIdx = yIdx;
    });
    var yr = spec.y || {}, xr = spec.x || {};
    var opts = {
      width: width,
      height: plotHeight(width),
      legend: { show: false },
      cursor: { drag: { x: false, y: false }, points: { size: 7 } },
      select: { show: false },
      scales: {
        x: {
          time: false,
          range: function (u, min, max) {
            var lo = xr.min !== undefined ? xr.min : min, hi = xr.max !== undefined ? xr.max : max;
            if (!(hi > lo)) hi = lo + 1;
            return [lo, hi];
          }
        },
        y: {
          range: function (u, min, max) {
            var lo = yr.min !== undefined ? yr.min : min, hi = yr.max !== undefined ? yr.max : max;
            if (!(hi > lo)) hi = lo + (lo === 0 ? 1 : Math.abs(lo));
            if (yr.max === undefined) hi = hi + (hi - lo) * 0.05;
            return [lo, hi];
          }
        }
      },
      axes: [
        {
          label: xr.label || "", labelSize: 24, size: 36,
          splits: xr.unit === "hours" ? hourSplits : undefined,
          values: axisValues(xr.unit), grid: { stroke: "#e4e4e4", width: 1 }, ticks: { stroke: "#bbb", width: 1 }
        },
        {
          label: yr.label || "", labelSize: 22, size: 58,
          values: axisValues(yr.unit), grid: { stroke: "#e4e4e4", width: 1 }, ticks: { stroke: "#bbb", width: 1 }
        }
      ],
      series: series,
      bands: bands,
      hooks: { setCursor: [function (u) { showReadout(box, spec, joined, u); }] }
    };
    return new uPlot(opts, joined.data, box.plot);
  }

  function showReadout(box, spec, joined, u) {
    var i = u.cursor.idx, out = box.readout;
    out.textContent = "";
    if (i === null || i === undefined) return;
    var xs = u.data[0];
    out.appendChild(el("span", "ro-x", readout((spec.x || {}).unit, xs[i])));
    joined.cols.forEach(function (c) {
      var v = u.data[c.yIdx][i];
      if (v === null || v === undefined) return;
      var item = el("span", "ro-item");
      var sw = el("span", "swatch");
      sw.style.backgroundColor = colour(c.s.group);
      item.appendChild(sw);
      item.appendChild(document.createTextNode((c.s.role ? c.s.name + " " + c.s.role : c.s.name) + " " + readout((spec.y || {}).unit, v)));
      out.appendChild(item);
    });
  }

  function legend(spec) {
    var box = el("div", "legend");
    var seen = {}, roles = {}, bands = {};
    (spec.series || []).forEach(function (s) {
      var key = s.group + "\u0000" + s.name;
      if (!seen[key]) {
        seen[key] = true;
        var item = el("span", "lg-item");
        var sw = el("span", "swatch");
        sw.style.backgroundColor = colour(s.group);
        item.appendChild(sw);
        item.appendChild(document.createTextNode(s.name));
        box.appendChild(item);
      }
      if (s.role) roles[s.role] = s.style || "solid";
      if (s.band) bands[s.band] = true;
    });
    var keys = Object.keys(roles);
    if (keys.length > 1 || Object.keys(bands).length > 0) {
      var styles = el("div", "legend legend-styles");
      keys.forEach(function (r) {
        var item = el("span", "lg-item");
        item.appendChild(el("span", "stroke stroke-" + roles[r]));
        item.appendChild(document.createTextNode(r));
        styles.appendChild(item);
      });
      Object.keys(bands).forEach(function (b) {
        var item = el("span", "lg-item");
        item.appendChild(el("span", "bandkey"));
        item.appendChild(document.createTextNode(b));
        styles.appendChild(item);
      });
      var wrap = el("div");
      wrap.appendChild(box);
      wrap.appendChild(styles);
      return wrap;
    }
    return box;
  }

  // charts holds the live uPlot instances by chart id.
  var charts = {};

  function chartFigure(spec, prevCharts) {
    var fig = el("figure", "chart");
    fig.id = "chart-" + spec.id;
    fig.appendChild(el("h2", null, spec.title));
    if (spec.note) fig.appendChild(el("p", "note", spec.note));
    var plot = el("div", "plot");
    fig.appendChild(plot);
    var readoutBox = el("div", "readout");
    fig.appendChild(readoutBox);
    fig.appendChild(legend(spec));
    return { fig: fig, plot: plot, readout: readoutBox };
  }

  function drawCharts(grid, specs) {
    var next = {};
    specs.forEach(function (spec) {
      var joined = chartData(spec);
      var sig = signature(spec);
      var old = charts[spec.id];
      if (old && old.sig === sig && joined) {
        old.joined.cols = joined.cols;
        old.u.setData(joined.data);
        old.spec = spec;
        grid.appendChild(old.box.fig);
        next[spec.id] = old;
        return;
      }
      if (old) {
        if (observer) observer.unobserve(old.box.plot);
        old.u.destroy();
      }
      var box = chartFigure(spec);
      grid.appendChild(box.fig);
      if (!joined) {
        box.plot.appendChild(el("p", "empty", "No data yet."));
        return;
      }
      var width = Math.max(240, Math.floor(box.plot.clientWidth || grid.clientWidth || 600));
      var u = buildChart(box, spec, joined, width);
      next[spec.id] = { u: u, sig: sig, box: box, joined: joined, spec: spec };
      if (observer) observer.observe(box.plot);
    });
    Object.keys(charts).forEach(function (id) {
      if (!next[id]) {
        if (observer) observer.unobserve(charts[id].box.plot);
        charts[id].u.destroy();
      }
    });
    charts = next;
  }

  function resizeCharts() {
    Object.keys(charts).forEach(function (id) { fit(charts[id]); });
  }

  // fit sizes a chart to its box.
  function fit(c) {
    var w = Math.max(240, Math.floor(c.box.plot.clientWidth));
    if (w && w !== c.u.width) c.u.setSize({ width: w, height: plotHeight(w) });
  }

  var observer = window.ResizeObserver ? new ResizeObserver(function () { resizeCharts(); }) : null;

  function filterValue() {
    var m = /[?&]status=([^&#]*)/.exec(location.search);
    return m ? decodeURIComponent(m[1]) : "";
  }

  function table(t) {
    var wrap = el("section", "table-wrap");
    if (t.id) wrap.id = "table-" + t.id;
    var rows = t.rows || [];
    var head = t.header || [];
    if (t.caption) wrap.appendChild(el("h2", null, t.caption));
    var fcol = t.filter ? head.indexOf(t.filter) : -1;
    var want = fcol >= 0 ? filterValue() : "";
    if (fcol >= 0) {
      var values = {};
      rows.forEach(function (r) { values[r[fcol]] = true; });
      var bar = el("div", "filter");
      var label = el("label", null, "Show ");
      var sel = el("select");
      sel.id = "filter-" + (t.id || "table");
      [""].concat(Object.keys(values).sort()).forEach(function (v) {
        var o = el("option", null, v === "" ? "every " + t.filter : v);
        o.value = v;
        if (v === want) o.selected = true;
        sel.appendChild(o);
      });
      sel.addEventListener("change", function () {
        var q = sel.value ? "?status=" + encodeURIComponent(sel.value) : location.pathname;
        history.replaceState(null, "", q);
        refreshNow();
      });
      label.appendChild(sel);
      bar.appendChild(label);
      wrap.appendChild(bar);
    }
    var shown = rows.map(function (r, i) { return i; }).filter(function (i) {
      return fcol < 0 || want === "" || rows[i][fcol] === want;
    });
    if (shown.length === 0) {
      wrap.appendChild(el("p", "empty", t.empty || "Nothing to show."));
      return wrap;
    }
    var scroller = el("div", "scroll");
    // A wide table turns into one card per row on a phone (ripen.css).
    var tab = el("table", head.length >= 4 ? "wide" : null);
    var thead = el("thead"), tr = el("tr");
    head.forEach(function (h) { tr.appendChild(el("th", null, h)); });
    thead.appendChild(tr);
    tab.appendChild(thead);
    var tbody = el("tbody");
    shown.forEach(function (i) {
      var r = rows[i], row = el("tr");
      r.forEach(function (cell, j) {
        var td = el("td");
        if (j === 0) {
          if (t.groups && t.groups[i] >= 0) {
            var sw = el("span", "swatch");
            sw.style.backgroundColor = colour(t.groups[i]);
            td.appendChild(sw);
          }
          var href = t.links ? safeHref(t.links[i]) : null;
          if (href) {
            var a = el("a", null, cell);
            a.href = href;
            td.appendChild(a);
          } else {
            td.appendChild(document.createTextNode(cell));
          }
        } else {
          td.textContent = cell;
          td.setAttribute("data-label", head[j] || "");
        }
        row.appendChild(td);
      });
      tbody.appendChild(row);
    });
    tab.appendChild(tbody);
    scroller.appendChild(tab);
    wrap.appendChild(scroller);
    return wrap;
  }

  // lastText is the text part of the page last rendered (all but the
  // charts); when a refresh leaves it unchanged only the charts update,
  // so an open menu or a selection is not torn down every few seconds.
  var lastText = null, lastGrid = null;

  function bump(root) {
    root.setAttribute("data-rendered", String((Number(root.getAttribute("data-rendered")) || 0) + 1));
  }

  function render(root, page) {
    var text = JSON.stringify([page.title, page.facts, page.paragraphs, page.tables, page.links, page.after,
      (page.charts || []).map(function (c) { return [c.id, c.title, c.note]; })]) + location.search;
    if (text === lastText && lastGrid && lastGrid.parentNode) {
      drawCharts(lastGrid, page.charts || []);
      bump(root);
      return;
    }
    lastText = text;
    var title = page.title || "";
    document.title = title ? title + " · ripen" : "ripen";
    var frag = document.createDocumentFragment();
    frag.appendChild(el("h1", null, title));
    if (page.facts && page.facts.length) {
      var facts = el("dl", "facts");
      page.facts.forEach(function (f) {
        var item = el("div", "fact");
        item.appendChild(el("dt", null, f.label));
        item.appendChild(el("dd", f.tone ? "tone-" + f.tone : null, f.value));
        facts.appendChild(item);
      });
      frag.appendChild(facts);
    }
    (page.paragraphs || []).forEach(function (p) { frag.appendChild(el("p", "para", p)); });
    (page.tables || []).forEach(function (t) { frag.appendChild(table(t)); });
    var grid = el("div", "charts");
    frag.appendChild(grid);
    if (page.links && page.links.length) {
      var links = el("p", "links");
      page.links.forEach(function (l) {
        var href = safeHref(l.href);
        if (!href) return;
        var a = el("a", null, l.text);
        a.href = href;
        links.appendChild(a);
      });
      frag.appendChild(links);
    }
    (page.after || []).forEach(function (t) { frag.appendChild(table(t)); });
    // Detach live charts before the old content goes, then re-attach.
    Object.keys(charts).forEach(function (id) {
      var f = charts[id].box.fig;
      if (f.parentNode) f.parentNode.removeChild(f);
    });
    var y = window.scrollY;
    root.textContent = "";
    root.appendChild(frag);
    drawCharts(grid, page.charts || []);
    lastGrid = grid;
    window.scrollTo(0, y);
    bump(root);
  }

  var root, timer = null, src = null, every = 0, status = null;

  function setStatus(text, bad) {
    if (!status) return;
    status.textContent = text;
    status.className = bad ? "live live-bad" : "live";
  }

  function refreshNow() {
    if (!src) return;
    if (timer) clearTimeout(timer);
    var url = src + (src.indexOf("?") >= 0 ? "&" : "?") + location.search.replace(/^\?/, "");
    fetch(url, { cache: "no-store", credentials: "same-origin", headers: { Accept: "application/json" } })
      .then(function (resp) {
        if (!resp.ok) {
          return resp.text().then(function (t) { throw new Error(resp.status + " " + t.trim()); });
        }
        return resp.json();
      })
      .then(function (page) {
        render(root, page);
        setStatus("updated " + new Date().toLocaleTimeString(), false);
      })
      .catch(function (err) {
        setStatus("not updated: " + err.message, true);
      })
      .then(function () {
        if (every > 0) timer = setTimeout(refreshNow, every * 1000);
      });
  }

  function start() {
    root = document.getElementById("page");
    status = document.getElementById("live");
    if (!root) return;
    var inline = document.getElementById("page-data");
    if (inline) {
      render(root, JSON.parse(inline.textContent));
    } else {
      src = safeHref(root.getAttribute("data-src"));
      every = Number(root.getAttribute("data-refresh")) || 0;
      refreshNow();
    }
    var pending = null;
    window.addEventListener("resize", function () {
      if (pending) clearTimeout(pending);
      pending = setTimeout(resizeCharts, 100);
    });
  }

  if (document.readyState === "loading") document.addEventListener("DOMContentLoaded", start);
  else start();
})();
