/* Sillmark: a small line chart on a canvas (level on x; one or two y axes). */
(function () {
  "use strict";

  // Text metrics of the chart, in CSS pixels: one line of 11 px text, the band
  // of a rotated axis title, and the gaps around tick labels.
  var FONT = "11px system-ui, -apple-system, 'Segoe UI', sans-serif";
  var LINE = 12, TITLE_BAND = 14, GAP = 4, TICK_GAP = 5;

  function niceTicks(lo, hi, count) {
    if (!(hi > lo)) { hi = lo + 1; }
    var raw = (hi - lo) / Math.max(count, 1);
    var mag = Math.pow(10, Math.floor(Math.log10(raw)));
    var step = [1, 2, 2.5, 5, 10].map(function (m) { return m * mag; }).find(function (s) { return s >= raw; });
    var start = Math.ceil(lo / step) * step;
    var ticks = [];
    for (var v = start; v <= hi + step * 1e-6; v += step) { ticks.push(+v.toFixed(10)); }
    return ticks;
  }

  function shortNumber(v) {
    var a = Math.abs(v);
    if (a >= 1e6) { return (v / 1e6).toFixed(a >= 1e7 ? 0 : 1) + "M"; }
    if (a >= 1e4) { return (v / 1e3).toFixed(0) + "k"; }
    if (a >= 1e3) { return (v / 1e3).toFixed(1) + "k"; }
    if (a >= 10 || a === 0) { return v.toFixed(0); }
    return v.toFixed(a >= 1 ? 1 : 2);
  }

  /*
   * options: { xLabel, left: {label}, right: {label}|null,
   *            series: [{x:[], y:[], axis:"left"|"right", colour, dash:[], width}],
   *            marker: number|null, onPick: function(x) }
   */
  function LineChart(canvas, options) {
    this.canvas = canvas;
    this.options = options;
    this.marker = options.marker;
    canvas.sillmarkChart = this;  // the page (and its tests) can read the chart's layout
    var self = this;
    if (options.onPick) {
      canvas.style.cursor = "crosshair";
      var picking = false;
      var pick = function (ev) {
        var r = canvas.getBoundingClientRect();
        var x = self.xFromPixel(ev.clientX - r.left);
        if (x !== null) { options.onPick(x); }
      };
      canvas.addEventListener("pointerdown", function (ev) { picking = true; canvas.setPointerCapture(ev.pointerId); pick(ev); });
      canvas.addEventListener("pointermove", function (ev) { if (picking) { pick(ev); } });
      canvas.addEventListener("pointerup", function () { picking = false; });
    }
    window.addEventListener("resize", function () { self.draw(); });
    this.draw();
  }

  LineChart.prototype.setMarker = function (x) { this.marker = x; this.draw(); };

  LineChart.prototype.xFromPixel = function (px) {
    if (!this.frame) { return null; }
    var f = this.frame;
    var t = (px - f.x0) / (f.x1 - f.x0);
    if (t < -0.02 || t > 1.02) { return null; }
    t = Math.min(Math.max(t, 0), 1);
    return f.xmin + t * (f.xmax - f.xmin);
  };

  LineChart.prototype.draw = function () {
    var c = this.canvas, o = this.options;
    var cssW = c.clientWidth || c.width, cssH = c.clientHeight || c.height;
    var dpr = window.devicePixelRatio || 1;
    if (c.width !== Math.round(cssW * dpr) || c.height !== Math.round(cssH * dpr)) {
      c.width = Math.round(cssW * dpr); c.height = Math.round(cssH * dpr);
    }
    var g = c.getContext("2d");
    g.setTransform(dpr, 0, 0, dpr, 0, 0);
    g.clearRect(0, 0, cssW, cssH);
    var series = o.series.filter(function (s) { return s.x.length > 1; });
    if (!series.length) { return; }
    var xmin = Infinity, xmax = -Infinity, lmax = 0, rmax = 0;
    series.forEach(function (s) {
      s.x.forEach(function (v) { if (v < xmin) { xmin = v; } if (v > xmax) { xmax = v; } });
      s.y.forEach(function (v) {
        if (v === null || !isFinite(v)) { return; }
        if (s.axis === "right") { rmax = Math.max(rmax, v); } else { lmax = Math.max(lmax, v); }
      });
    });
    if (!(lmax > 0)) { lmax = 1; }
    if (!(rmax > 0)) { rmax = 1; }
    g.font = FONT;
    var lt = niceTicks(0, lmax, 4), rt = niceTicks(0, rmax, 4);
    // Margins from the widest tick label, so no label reaches an axis title.
    var widest = function (ticks) {
      return ticks.reduce(function (w, v) { return Math.max(w, g.measureText(shortNumber(v)).width); }, 0);
    };
    var lw = widest(lt), rw = o.right ? widest(rt) : 0;
    var left = TITLE_BAND + GAP + lw + TICK_GAP;
    var right = o.right ? TITLE_BAND + GAP + rw + TICK_GAP : 12;
    var top = 10, bottom = TICK_GAP + LINE + GAP + LINE + 2;
    var x0 = left, x1 = cssW - right, y0 = cssH - bottom, y1 = top;
    this.frame = { x0: x0, x1: x1, xmin: xmin, xmax: xmax };
    var boxes = { leftTicks: [], rightTicks: [], xTicks: [], titles: [] };
    this.boxes = boxes;
    var ltop = lt[lt.length - 1] >= lmax ? lt[lt.length - 1] : lmax;
    var rtop = rt[rt.length - 1] >= rmax ? rt[rt.length - 1] : rmax;
    function X(v) { return x0 + (v - xmin) / (xmax - xmin || 1) * (x1 - x0); }
    function YL(v) { return y0 - v / ltop * (y0 - y1); }
    function YR(v) { return y0 - v / rtop * (y0 - y1); }

    g.lineWidth = 1;
    g.strokeStyle = "#e4e9eb";
    g.fillStyle = "#5b6a72";
    g.textAlign = "right"; g.textBaseline = "middle";
    lt.forEach(function (v) {
      var y = Math.round(YL(v)) + 0.5;
      g.beginPath(); g.moveTo(x0, y); g.lineTo(x1, y); g.stroke();
      var text = shortNumber(v), w = g.measureText(text).width;
      g.fillText(text, x0 - TICK_GAP, y);
      boxes.leftTicks.push([x0 - TICK_GAP - w, y - LINE / 2, w, LINE]);
    });
    if (o.right) {
      g.textAlign = "left";
      rt.forEach(function (v) {
        var text = shortNumber(v), w = g.measureText(text).width, y = YR(v);
        g.fillText(text, x1 + TICK_GAP, y);
        boxes.rightTicks.push([x1 + TICK_GAP, y - LINE / 2, w, LINE]);
      });
    }
    g.textAlign = "center"; g.textBaseline = "top";
    niceTicks(xmin, xmax, 5).forEach(function (v) {
      var x = Math.round(X(v)) + 0.5;
      g.strokeStyle = "#c9d1d4";
      g.beginPath(); g.moveTo(x, y0); g.lineTo(x, y0 + 4); g.stroke();
      var text = v.toFixed(Math.abs(xmax - xmin) < 5 ? 1 : 0), w = g.measureText(text).width;
      g.fillText(text, x, y0 + TICK_GAP);
      boxes.xTicks.push([x - w / 2, y0 + TICK_GAP, w, LINE]);
    });
    g.fillStyle = "#34444d";
    var titleY = y0 + TICK_GAP + LINE + GAP, xw = g.measureText(o.xLabel).width;
    g.fillText(o.xLabel, (x0 + x1) / 2, titleY);
    boxes.titles.push([(x0 + x1) / 2 - xw / 2, titleY, xw, LINE]);
    // Rotated axis titles, centred in their bands at the outer edges.
    var mid = (y0 + y1) / 2, lw2 = g.measureText(o.left.label).width;
    g.save();
    g.translate(TITLE_BAND / 2, mid); g.rotate(-Math.PI / 2); g.textBaseline = "middle";
    g.fillText(o.left.label, 0, 0);
    g.restore();
    boxes.titles.push([TITLE_BAND / 2 - LINE / 2, mid - lw2 / 2, LINE, lw2]);
    if (o.right) {
      var rw2 = g.measureText(o.right.label).width;
      g.save();
      g.translate(cssW - TITLE_BAND / 2, mid); g.rotate(Math.PI / 2); g.textBaseline = "middle";
      g.fillText(o.right.label, 0, 0);
      g.restore();
      boxes.titles.push([cssW - TITLE_BAND / 2 - LINE / 2, mid - rw2 / 2, LINE, rw2]);
    }
    g.strokeStyle = "#9aa7ad";
    g.beginPath(); g.moveTo(x0, y1); g.lineTo(x0, y0 + 0.5); g.lineTo(x1, y0 + 0.5); g.stroke();

    series.forEach(function (s) {
      var Y = s.axis === "right" ? YR : YL;
      if (s.points) {  // marks only, e.g. stations along a profile
        g.fillStyle = s.colour;
        for (var j = 0; j < s.x.length; j++) {
          if (s.y[j] === null || !isFinite(s.y[j])) { continue; }
          g.beginPath(); g.arc(X(s.x[j]), Y(s.y[j]), 3.5, 0, 2 * Math.PI); g.fill();
        }
        return;
      }
      g.strokeStyle = s.colour; g.lineWidth = s.width || 2; g.setLineDash(s.dash || []);
      g.beginPath();
      var started = false;
      for (var k = 0; k < s.x.length; k++) {
        var v = s.y[k];
        if (v === null || !isFinite(v)) { started = false; continue; }
        if (!started) { g.moveTo(X(s.x[k]), Y(v)); started = true; } else { g.lineTo(X(s.x[k]), Y(v)); }
      }
      g.stroke();
    });
    g.setLineDash([]);
    if (this.marker !== null && this.marker !== undefined && isFinite(this.marker) &&
        this.marker >= xmin && this.marker <= xmax) {
      var mx = X(this.marker);
      g.strokeStyle = "#b5651d"; g.lineWidth = 1.5;
      g.beginPath(); g.moveTo(mx, y1); g.lineTo(mx, y0); g.stroke();
      g.fillStyle = "#b5651d"; g.beginPath(); g.moveTo(mx - 5, y1); g.lineTo(mx + 5, y1); g.lineTo(mx, y1 + 6); g.fill();
    }
  };

  window.SillmarkChart = { LineChart: LineChart };
})();
