/* Inrush status page and report: interactive charts drawn from the embedded series document.
 *
 * Reads the JSON data block #inrush-data (never executed, so the page's CSP stays strict),
 * draws the arm-share, entrants and engagement charts with uPlot, keeps them on one date
 * range (drag to zoom, the "from/to" form, double-click or "All days" to reset), shows the
 * exact date and values under the pointer, and exports charts as PNG (the current view) or
 * SVG (the server-drawn chart of the whole period). Without JavaScript the page shows the
 * server-drawn charts that sit in <noscript>.
 */
(function () {
  "use strict";
  var holder = document.getElementById("inrush-data");
  if (!holder || typeof uPlot === "undefined") { return; }
  var data = JSON.parse(holder.textContent);
  var series = data.series;
  var palette = data.palette;
  var DAY = 86400;
  var HALF = DAY / 2;
  var PAPER = "#F6F3EA", INK = "#1E2A2F", GRID = "#DAD4C3", BRICK = "#9E4330",
      OCHRE = "#B9822A";
  var WEEKDAYS = ["Sun", "Mon", "Tue", "Wed", "Thu", "Fri", "Sat"];
  var MONTHS = ["Jan", "Feb", "Mar", "Apr", "May", "Jun", "Jul", "Aug", "Sep", "Oct", "Nov",
                "Dec"];
  var charts = [];
  var syncing = false;
  document.documentElement.classList.add("js");

  function toSeconds(iso) {
    var p = iso.split("-");
    return Date.UTC(+p[0], +p[1] - 1, +p[2]) / 1000;
  }
  function isoDay(seconds) { return new Date(seconds * 1000).toISOString().slice(0, 10); }
  function longDay(seconds) {
    var d = new Date(seconds * 1000);
    return WEEKDAYS[d.getUTCDay()] + " " + isoDay(seconds);
  }
  function shortDay(seconds) {
    var d = new Date(seconds * 1000);
    return ("0" + d.getUTCDate()).slice(-2) + " " + MONTHS[d.getUTCMonth()];
  }
  function grouped(value, digits) {
    return value == null ? "\u2013" : value.toLocaleString("en-US", {
      minimumFractionDigits: digits, maximumFractionDigits: digits });
  }
  function percent(value) { return value == null ? "\u2013" : (100 * value).toFixed(1) + "%"; }
  function rounded(value) {
    return value == null ? "\u2013" : Number(value.toPrecision(4)).toLocaleString("en-US");
  }

  var xs = series.days.map(function (d) { return toSeconds(d.date); });
  var flags = {};
  series.days.forEach(function (d) { if (d.flagged) { flags[toSeconds(d.date)] = d.severity; } });

  function dayLabel(u, v) {
    if (v == null) { return "\u2013"; }
    var day = Math.round(v / DAY) * DAY;
    return longDay(day) + (flags[day] ? " \u00b7 flagged (" + flags[day] + ")" : "");
  }

  function hatch(severity) {
    var tile = document.createElement("canvas");
    tile.width = tile.height = 8;
    var ctx = tile.getContext("2d");
    var colour = severity === "alert" ? BRICK : OCHRE;
    ctx.fillStyle = colour + "1F";
    ctx.fillRect(0, 0, 8, 8);
    ctx.strokeStyle = colour + "B3";
    ctx.fillStyle = colour + "B3";
    if (severity === "alert") {  // dense diagonal, as on the server-drawn charts
      ctx.lineWidth = 1;
      ctx.beginPath(); ctx.moveTo(0, 8); ctx.lineTo(8, 0); ctx.stroke();
    } else {  // dots for watch days
      ctx.fillRect(3, 3, 2, 2);
    }
    return tile;
  }
  var tiles = { alert: hatch("alert"), watch: hatch("watch") };

  // Hatched bands behind the data on flagged days, a whole day wide.
  function drawFlags(u) {
    var ctx = u.ctx;
    ctx.save();
    ctx.beginPath();
    ctx.rect(u.bbox.left, u.bbox.top, u.bbox.width, u.bbox.height);
    ctx.clip();
    Object.keys(flags).forEach(function (key) {
      var day = +key;
      var left = u.valToPos(day - HALF, "x", true);
      var right = u.valToPos(day + HALF, "x", true);
      ctx.fillStyle = ctx.createPattern(tiles[flags[key]], "repeat");
      ctx.fillRect(left, u.bbox.top, right - left, u.bbox.height);
    });
    ctx.restore();
  }

  function propagate(u, key) {
    if (key !== "x" || syncing) { return; }
    var min = u.scales.x.min, max = u.scales.x.max;
    syncing = true;
    charts.forEach(function (other) {
      if (other.plot !== u) { other.plot.setScale("x", { min: min, max: max }); }
    });
    syncing = false;
    showRange(min, max);
  }

  function baseOptions(width, height, ySeries, yFormat, yLabel) {
    return {
      width: width, height: height,
      tzDate: function (ts) { return uPlot.tzDate(new Date(ts * 1000), "Etc/UTC"); },
      scales: { x: { time: true } },
      cursor: { sync: { key: "inrush", setSeries: false }, drag: { x: true, y: false },
                // Double-click shows every day, with the half-day margins of zoomAll.
                bind: { dblclick: function () {
                  return function () { zoomAll(); return null; }; } } },
      legend: { live: true },
      series: [{ label: "Day", value: dayLabel }].concat(ySeries),
      axes: [
        { stroke: INK, grid: { stroke: GRID, width: 1 }, ticks: { stroke: GRID },
          space: 70, values: function (u, splits) { return splits.map(shortDay); } },
        { stroke: INK, grid: { stroke: GRID, width: 1 }, ticks: { stroke: GRID },
          label: yLabel, size: 62,
          values: function (u, splits) { return splits.map(yFormat); } },
      ],
      hooks: { drawClear: [drawFlags], setScale: [propagate] },
    };
  }

  function look(i) { return palette[i % palette.length]; }

  function mount(box, options, columns, title, group, panel) {
    box.textContent = "";
    var plot = new uPlot(options, columns, box);
    var keys = options.series.slice(1).map(function (s) {
      return { label: s.label, color: s.stroke, dash: s.dash || [] };
    });
    var entry = { plot: plot, box: box, title: title, group: group, panel: panel, keys: keys };
    charts.push(entry);
    return entry;
  }

  function width(box) { return Math.max(280, box.clientWidth || 600); }

  function shareChart(box) {
    var ys = [], columns = [xs];
    series.arms.forEach(function (arm, i) {
      var s = look(i);
      ys.push({ label: arm + ": observed", stroke: s.color, dash: s.dash, width: 1.8,
                points: { show: true, size: 5, fill: s.color }, value: function (u, v) {
                  return percent(v); } });
      ys.push({ label: arm + ": planned", stroke: s.color, dash: [2, 3], width: 1,
                points: { show: false }, paths: uPlot.paths.stepped({ align: 1 }),
                value: function (u, v) { return percent(v); } });
      columns.push(series.days.map(function (d) { return d.arms[arm].observed_share; }));
      columns.push(series.days.map(function (d) { return d.arms[arm].expected_share; }));
    });
    var options = baseOptions(width(box), 280, ys, function (v) {
      return (100 * v).toFixed(0) + "%"; }, "Share of the day's units");
    mount(box, options, columns, "Arm shares against the plan", "arm-shares", "");
  }

  function entrantsCharts(box) {
    var top = 0;
    series.sources.forEach(function (s) {
      series.arms.forEach(function (arm) {
        s.entered[arm].forEach(function (v) { top = Math.max(top, v); });
      });
    });
    box.textContent = "";
    series.arms.forEach(function (arm) {
      var panel = document.createElement("div");
      panel.className = "panel";
      var head = document.createElement("h3");
      head.textContent = "arm " + arm;
      panel.appendChild(head);
      var plotBox = document.createElement("div");
      panel.appendChild(plotBox);
      box.appendChild(panel);
      var ys = [], columns = [xs];
      series.sources.forEach(function (s, j) {
        var st = look(j);
        ys.push({ label: s.source, stroke: st.color, dash: st.dash, width: 1.5,
                  points: { show: true, size: 4, fill: st.color },
                  value: function (u, v) { return grouped(v, 0); } });
        columns.push(s.entered[arm]);
      });
      var options = baseOptions(width(box), 200, ys, function (v) { return grouped(v, 0); },
                                "Units entered");
      options.scales.y = { range: [0, Math.max(1, top * 1.05)] };
      mount(plotBox, options, columns, "Entrants per source and arm", "entrants", "arm " + arm);
    });
  }

  function engagementChart(box, metric) {
    var ys = [], columns = [xs];
    series.arms.forEach(function (arm, i) {
      var s = look(i);
      ys.push({ label: arm, stroke: s.color, dash: s.dash, width: 1.8,
                points: { show: true, size: 5, fill: s.color },
                value: function (u, v) { return rounded(v); } });
      columns.push(series.days.map(function (d) {
        var value = d.arms[arm].engagement[metric];
        return value == null ? null : value;
      }));
    });
    var options = baseOptions(width(box), 260, ys, rounded, "Mean " + metric + " per entrant");
    mount(box, options, columns, "Entrant engagement per arm: " + metric, "engagement", "");
  }

  // ---- date range -------------------------------------------------------------------------
  var range = document.getElementById("range");
  // The days shown: those whose midnight falls inside the scale's range.
  function firstDay(min) { return isoDay(Math.ceil(min / DAY) * DAY); }
  function lastDay(max) { return isoDay(Math.floor(max / DAY) * DAY); }
  function showRange(min, max) {
    if (!range) { return; }
    range.elements.from.value = firstDay(min);
    range.elements.to.value = lastDay(max);
  }
  function zoom(min, max) {
    if (!charts.length) { return; }
    charts[0].plot.setScale("x", { min: min, max: max });
  }
  function zoomAll() { zoom(xs[0] - HALF, xs[xs.length - 1] + HALF); }
  if (range && xs.length) {
    range.hidden = false;
    range.elements.from.min = range.elements.to.min = isoDay(xs[0]);
    range.elements.from.max = range.elements.to.max = isoDay(xs[xs.length - 1]);
    range.addEventListener("submit", function (event) {
      event.preventDefault();
      var from = range.elements.from.value, to = range.elements.to.value;
      if (!from || !to) { return; }
      var a = toSeconds(from), b = toSeconds(to);
      if (b < a) { var t = a; a = b; b = t; }
      zoom(a - HALF, b + HALF);
    });
    range.querySelector("[data-reset]").addEventListener("click", zoomAll);
  }

  // ---- exports ----------------------------------------------------------------------------
  function download(blob, name) {
    var link = document.createElement("a");
    link.href = URL.createObjectURL(blob);
    link.download = name;
    document.body.appendChild(link);
    link.click();
    setTimeout(function () { URL.revokeObjectURL(link.href); link.remove(); }, 1000);
  }

  // The plots' canvases (axes included) under a title, one below the other with their panel
  // names, and the series key below them: one picture of what is on screen.
  function pngOf(entries) {
    var r = uPlot.pxRatio || 1, pad = 12 * r, head = 30 * r, sub = 20 * r, line = 20 * r;
    var first = entries[0].plot;
    var widest = Math.max.apply(null, entries.map(function (e) { return e.plot.ctx.canvas.width; }));
    var keys = entries[0].keys.filter(function (k, i) { return first.series[i + 1].show; });
    ["alert", "watch"].forEach(function (level) {
      var any = Object.keys(flags).some(function (key) { return flags[key] === level; });
      if (any) { keys.push({ label: "flagged day (" + level + ")", tile: tiles[level] }); }
    });
    var perRow = Math.max(1, Math.floor(widest / (190 * r)));
    var rows = Math.ceil(keys.length / perRow);
    var panels = entries.length > 1;
    var height = head + rows * line + 2 * pad;
    entries.forEach(function (e) { height += e.plot.ctx.canvas.height + (panels ? sub : 0); });
    var out = document.createElement("canvas");
    out.width = widest + 2 * pad;
    out.height = height;
    var ctx = out.getContext("2d");
    ctx.fillStyle = PAPER;
    ctx.fillRect(0, 0, out.width, out.height);
    ctx.fillStyle = INK;
    ctx.font = "bold " + 14 * r + "px 'DejaVu Sans', sans-serif";
    ctx.fillText(entries[0].title + " (" + firstDay(first.scales.x.min) + " to " +
                 lastDay(first.scales.x.max) + ")", pad, pad + 14 * r);
    var y = head;
    entries.forEach(function (e) {
      if (panels) {
        ctx.font = "bold " + 12 * r + "px 'DejaVu Sans', sans-serif";
        ctx.fillText(e.panel, pad, y + 14 * r);
        y += sub;
      }
      ctx.drawImage(e.plot.ctx.canvas, pad, y);
      y += e.plot.ctx.canvas.height;
    });
    ctx.font = 11 * r + "px 'DejaVu Sans', sans-serif";
    keys.forEach(function (k, i) {
      var x = pad + (i % perRow) * 190 * r, ky = y + pad + Math.floor(i / perRow) * line;
      if (k.tile) {
        ctx.fillStyle = ctx.createPattern(k.tile, "repeat");
        ctx.fillRect(x, ky - 7 * r, 24 * r, 14 * r);
      } else {
        ctx.strokeStyle = k.color;
        ctx.lineWidth = 2 * r;
        ctx.setLineDash(k.dash.map(function (d) { return d * r; }));
        ctx.beginPath(); ctx.moveTo(x, ky); ctx.lineTo(x + 24 * r, ky); ctx.stroke();
        ctx.setLineDash([]);
      }
      ctx.fillStyle = INK;
      ctx.fillText(k.label, x + 30 * r, ky + 4 * r);
    });
    return out;
  }

  function exportPng(name) {
    var picked = charts.filter(function (c) { return c.group === name; });
    if (!picked.length) { return; }
    var file = name === "engagement" ? name + "-" + data.metric : name;
    pngOf(picked).toBlob(function (blob) { download(blob, slug + "-" + file + ".png"); });
  }

  function exportSvg(button) {
    var section = button.closest("section");
    var metric = data.metric;
    var holders = section.querySelectorAll("noscript[data-svg]");
    var chosen = null;
    holders.forEach(function (n) {
      if (!chosen || n.getAttribute("data-metric") === metric) { chosen = n; }
    });
    if (!chosen) { return; }
    var text = '<?xml version="1.0" encoding="utf-8"?>\n' + chosen.textContent.trim() + "\n";
    download(new Blob([text], { type: "image/svg+xml" }),
             slug + "-" + chosen.getAttribute("data-svg") + ".svg");
  }

  var slug = data.experiment || "experiment";
  document.querySelectorAll("[data-export]").forEach(function (tools) {
    tools.hidden = false;
    tools.querySelector("[data-png]").addEventListener("click", function () {
      exportPng(tools.getAttribute("data-export"));
    });
    tools.querySelector("[data-svg-button]").addEventListener("click", function (event) {
      exportSvg(event.currentTarget);
    });
  });

  // ---- metric picker ----------------------------------------------------------------------
  var picker = document.getElementById("metric-picker");
  function showMetric(metric) {
    data.metric = metric;
    document.querySelectorAll("[data-metric-label]").forEach(function (el) {
      el.textContent = metric;
    });
    document.querySelectorAll("[data-metric-section]").forEach(function (el) {
      el.hidden = el.getAttribute("data-metric-section") !== metric;
    });
    var box = document.querySelector("[data-chart=engagement]");
    if (box) {
      charts = charts.filter(function (c) {
        if (c.box === box) { c.plot.destroy(); return false; }
        return true;
      });
      engagementChart(box, metric);
      if (charts.length > 1) {
        var first = charts[0].plot.scales.x;
        charts[charts.length - 1].plot.setScale("x", { min: first.min, max: first.max });
      }
    }
  }
  if (picker) {
    var params = new URLSearchParams(window.location.search);
    if (data.mode === "report") {
      // A file has no server: switch here, and keep ?metric= in the address for a reload.
      picker.querySelector("button").hidden = true;
      var asked = params.get("metric");
      if (asked && series.metrics.indexOf(asked) >= 0) {
        data.metric = asked;
        picker.elements.metric.value = asked;
      }
      picker.addEventListener("change", function () {
        var metric = picker.elements.metric.value;
        params.set("metric", metric);
        history.replaceState(null, "", "?" + params.toString() + window.location.hash);
        showMetric(metric);
      });
    } else {
      // The server re-estimates the effect for the chosen metric: ask it for the page.
      picker.addEventListener("change", function () { picker.submit(); });
    }
  }

  // ---- draw -------------------------------------------------------------------------------
  if (!xs.length) { return; }
  var shareBox = document.querySelector("[data-chart=share]");
  if (shareBox) { shareChart(shareBox); }
  var entrantsBox = document.querySelector("[data-chart=entrants]");
  if (entrantsBox) { entrantsCharts(entrantsBox); }
  if (data.metric) { showMetric(data.metric); }
  // Half a day of margin on either side, so the first and last days' bands show whole.
  zoomAll();

  var resizing = null;
  window.addEventListener("resize", function () {
    clearTimeout(resizing);
    resizing = setTimeout(function () {
      charts.forEach(function (c) {
        c.plot.setSize({ width: width(c.box.closest("[data-chart]") || c.box),
                         height: c.plot.height });
      });
    }, 150);
  });
  document.documentElement.setAttribute("data-charts", String(charts.length));
})();
