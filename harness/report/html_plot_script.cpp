// headroom — the plot script of the HTML report (html_plot_script.h). Plain
// ES5 plus a few ES2015 library calls (Math.log10), drawn with the DOM's SVG
// namespace API; no library, no network.
#include "html_plot_script.h"

namespace headroom::report_detail {

const char* const kPlotScript = R"JS(
(function () {
  "use strict";
  var data = JSON.parse(document.getElementById("headroom-data").textContent);
  var NS = "http://www.w3.org/2000/svg";
  var W = 640, H = 340, M = {l: 70, r: 20, t: 16, b: 60};
  var PW = W - M.l - M.r, PH = H - M.t - M.b;

  function el(name, attrs, parent) {
    var e = document.createElementNS(NS, name);
    for (var k in attrs) if (Object.prototype.hasOwnProperty.call(attrs, k)) e.setAttribute(k, attrs[k]);
    if (parent) parent.appendChild(e);
    return e;
  }
  function label(parent, x, y, s, attrs) {
    var a = attrs || {};
    a.x = x; a.y = y;
    var t = el("text", a, parent);
    t.textContent = s;
    return t;
  }
  function tip(mark, s) { el("title", {}, mark).textContent = s; }
  function frame(id, width, height, title) {
    var fig = document.getElementById("fig-" + id);
    var s = el("svg", {id: "plot-" + id, viewBox: "0 0 " + width + " " + height, width: width, height: height,
                       role: "img", "aria-label": title}, null);
    fig.insertBefore(s, fig.firstChild);
    return s;
  }
  function caption(id, s) {
    var c = document.getElementById("note-" + id);
    if (c) c.textContent = s;
  }
  function minmax(values) {
    var lo = Infinity, hi = -Infinity;
    for (var i = 0; i < values.length; i++) {
      if (values[i] < lo) lo = values[i];
      if (values[i] > hi) hi = values[i];
    }
    return [lo, hi];
  }
  // A decade scale over the positive values; zeros sit on the lower edge.
  function logScale(values) {
    var pos = values.filter(function (v) { return v > 0; });
    var lo = 0.1, hi = 10;
    if (pos.length > 0) {
      var m = minmax(pos);
      lo = Math.pow(10, Math.floor(Math.log10(m[0])));
      hi = Math.pow(10, Math.ceil(Math.log10(m[1])));
      if (hi <= lo) hi = lo * 10;
    }
    var a = Math.log10(lo), b = Math.log10(hi);
    return {lo: lo, hi: hi, a: a, b: b,
            f: function (v) { return (Math.log10(v > lo ? v : lo) - a) / (b - a); }};
  }
  function decadeText(k) {
    if (k >= -3 && k <= 4) return String(Math.pow(10, k)).replace(/^0\./, "0.");
    return "1e" + k;
  }
  function axes(s, xs, ys, xlabel, ylabel) {
    el("rect", {x: M.l, y: M.t, width: PW, height: PH, "class": "plot-area"}, s);
    var decades = function (sc) { var out = []; var step = Math.max(1, Math.ceil((sc.b - sc.a) / 8));
                                  for (var k = Math.round(sc.a); k <= Math.round(sc.b); k += step) out.push(k); return out; };
    decades(xs).forEach(function (k) {
      var x = M.l + (k - xs.a) / (xs.b - xs.a) * PW;
      el("line", {x1: x, x2: x, y1: M.t, y2: M.t + PH, "class": "grid"}, s);
      label(s, x, M.t + PH + 16, decadeText(k), {"text-anchor": "middle", "class": "tick"});
    });
    decades(ys).forEach(function (k) {
      var y = M.t + PH - (k - ys.a) / (ys.b - ys.a) * PH;
      el("line", {x1: M.l, x2: M.l + PW, y1: y, y2: y, "class": "grid"}, s);
      label(s, M.l - 6, y + 4, decadeText(k), {"text-anchor": "end", "class": "tick"});
    });
    label(s, M.l + PW / 2, H - 18, xlabel, {"text-anchor": "middle", "class": "axis-label"});
    label(s, 16, M.t + PH / 2, ylabel, {"text-anchor": "middle", "class": "axis-label",
                                        transform: "rotate(-90 16 " + (M.t + PH / 2) + ")"});
  }

  function scatter(id, key, xlabel, title) {
    var pts = data.cases.filter(function (c) { return c[key] !== null && c.scaled !== null; });
    var xs = logScale(pts.map(function (c) { return c[key]; }));
    // The axis spans the limits too, so each case's limit is drawn where it is.
    var ys = logScale(pts.map(function (c) { return c.scaled; }).concat(
        pts.filter(function (c) { return c.limit !== null && c.limit !== undefined; }).map(function (c) { return c.limit; })));
    var s = frame(id, W, H, title);
    axes(s, xs, ys, xlabel, "max scaled error (log)");
    pts.forEach(function (c) {
      if (c.limit === null || c.limit === undefined) return;
      var x = M.l + xs.f(c[key]) * PW, y = M.t + (1 - ys.f(c.limit)) * PH;
      tip(el("line", {x1: (x - 6).toFixed(2), x2: (x + 6).toFixed(2), y1: y.toFixed(2), y2: y.toFixed(2),
                      "class": "limit"}, s), c.name + ": scaled-error limit " + c.limit);
    });
    // Growth fits (error-vs-Tk only): log10 e = intercept + exponent · log10 Tk, over the Tk the family spans.
    var fits = key === "kv_len" ? (data.growth || []) : [];
    fits.forEach(function (g) {
      if (g.exponent === null || g.intercept === null) return;
      var at = function (tk) { return Math.pow(10, g.intercept + g.exponent * Math.log10(tk)); };
      var m = el("line", {x1: (M.l + xs.f(g.from) * PW).toFixed(2), y1: (M.t + (1 - ys.f(at(g.from))) * PH).toFixed(2),
                          x2: (M.l + xs.f(g.to) * PW).toFixed(2), y2: (M.t + (1 - ys.f(at(g.to))) * PH).toFixed(2),
                          "class": "fit"}, s);
      tip(m, g.family + " (" + g.format + "): growth exponent " + g.exponent.toFixed(2) + " ± " +
             (g.spread === null ? "?" : g.spread.toFixed(2)) + " over Tk " + g.from + "–" + g.to);
    });
    // Failing cases are drawn last so that they stay on top.
    pts.slice().sort(function (a, b) { return (a.pass === b.pass) ? 0 : (a.pass ? -1 : 1); }).forEach(function (c) {
      var m = el("circle", {cx: (M.l + xs.f(c[key]) * PW).toFixed(2), cy: (M.t + (1 - ys.f(c.scaled)) * PH).toFixed(2),
                            r: 4, "class": "mark " + (c.pass ? "pass" : "fail")}, s);
      tip(m, c.name + " (" + c.family + "): " + key + " " + c[key] + ", scaled error " + c.scaled + ", " + c.ulp + " ulp");
    });
    var left = data.cases.length - pts.length;
    caption(id, pts.length + " cases plotted" + (left ? "; " + left + " without a finite figure not plotted" : "") +
                (fits.length ? "; " + fits.length + " growth fits drawn" : "") +
                "; zero values sit on the lower or left edge.");
  }

  function histogram() {
    var counts = data.histogram.counts, labels = data.histogram.labels;
    var s = frame("ulp-histogram", W, H, "Histogram of ULP errors");
    el("rect", {x: M.l, y: M.t, width: PW, height: PH, "class": "plot-area"}, s);
    var max = 0, total = 0;
    counts.forEach(function (n) { if (n > max) max = n; total += n; });
    var top = Math.max(1, Math.ceil(Math.log10(1 + max)));
    for (var k = 0; k <= top; k++) {
      var y = M.t + PH - k / top * PH;
      el("line", {x1: M.l, x2: M.l + PW, y1: y, y2: y, "class": "grid"}, s);
      label(s, M.l - 6, y + 4, decadeText(k), {"text-anchor": "end", "class": "tick"});
    }
    var bw = PW / Math.max(1, counts.length);
    counts.forEach(function (n, i) {
      var x = M.l + i * bw;
      label(s, x + bw / 2, M.t + PH + 12, labels[i], {"text-anchor": "end", "class": "tick",
            transform: "rotate(-50 " + (x + bw / 2) + " " + (M.t + PH + 12) + ")"});
      if (n <= 0) return;
      // log10(1 + n) so that a bucket of one element still shows (at 0.3 of a decade).
      var h = Math.log10(1 + n) / top * PH;
      var m = el("rect", {x: (x + 1).toFixed(2), y: (M.t + PH - h).toFixed(2), width: Math.max(1, bw - 2).toFixed(2),
                          height: h.toFixed(2), "class": "mark bar"}, s);
      tip(m, labels[i] + " ulp: " + n + " elements");
    });
    label(s, M.l + PW / 2, H - 4, "ULP distance (upper edge of bucket)", {"text-anchor": "middle", "class": "axis-label"});
    label(s, 16, M.t + PH / 2, "elements (log, 1 + n)", {"text-anchor": "middle", "class": "axis-label",
                                                      transform: "rotate(-90 16 " + (M.t + PH / 2) + ")"});
    caption("ulp-histogram", total + " scored elements over " + data.cases.length + " cases.");
  }

  function faults() {
    var rows = data.faults, classes = data.fault_classes;
    var row = 24, left = 170, width = W, height = M.t + Math.max(1, rows.length) * row + 40;
    var s = frame("faults", width, height, "Faults by family");
    var max = 0, any = 0;
    rows.forEach(function (r) { var t = 0; for (var c in r.counts) t += r.counts[c]; r.total = t; if (t > max) max = t; any += t; });
    var pw = width - left - 60;
    rows.forEach(function (r, i) {
      var y = M.t + i * row;
      label(s, left - 8, y + row / 2 + 4, r.family, {"text-anchor": "end", "class": "tick"});
      var x = left;
      classes.forEach(function (name, ci) {
        var n = r.counts[name] || 0;
        if (n <= 0) return;
        var w = n / Math.max(1, max) * pw;
        var m = el("rect", {x: x.toFixed(2), y: y + 3, width: Math.max(1, w).toFixed(2), height: row - 6,
                            "class": "mark fault-" + (ci % 8)}, s);
        tip(m, r.family + ": " + n + " " + name);
        x += w;
      });
      label(s, x + 6, y + row / 2 + 4, String(r.total), {"class": "tick"});
    });
    el("line", {x1: left, x2: left, y1: M.t, y2: M.t + rows.length * row, "class": "axis"}, s);
    if (any === 0) label(s, left + pw / 2, M.t + rows.length * row / 2 + 4, "no fault detected",
                         {"text-anchor": "middle", "class": "axis-label"});
    caption("faults", any + " faults over " + rows.length + " families.");
  }

  scatter("kv-len", "kv_len", "key sequence length Tk (log)", "Error against sequence length");
  scatter("logit-scale", "logit_scale", "largest |scaled score| (log)", "Error against logit scale");
  histogram();
  faults();
  document.body.setAttribute("data-plots", "drawn");
})();
)JS";

}  // namespace headroom::report_detail
