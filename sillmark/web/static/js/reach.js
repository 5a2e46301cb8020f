/* Sillmark: the site page's river profile (offset mode) and cut-off ground.
 * Listens to the level control (event "sillmark:level") and the asset list
 * ("sillmark:assets") of site.js; talks only to this server. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var page = S.page(), config = page.config, map = page.map;
  var waterGroup = window[config.names.water];
  var unit = config.unit_symbol;
  var base = "/api/sites/" + config.site_id;
  var panel = document.getElementById("reach-panel");
  var level = config.level, info = null, figures = {}, markers = {};
  var cutLayer = null, offsetLayer = null, offsetMode = false, offset = 0, chart = null;
  if (!panel || !map) { return; }
  // site.js may have set the level (from the address) before this script ran.
  var shown = parseFloat((document.getElementById("level-number") || {}).value);
  if (isFinite(shown)) { level = shown; }

  function fmt(v) { return v === null || v === undefined ? "–" : v.toFixed(2); }
  function signed(v) { return (v >= 0 ? "+" : "−") + Math.abs(v).toFixed(2) + " " + unit; }
  function tileUrl(kind, v) {
    return "/tiles/" + config.site_id + "/" + kind + "/" + encodeURIComponent(v.toFixed(3)) +
      "/{z}/{x}/{y}.png?run=" + config.run_id;
  }
  function windowText(f) {
    if (f.cutoff_words === "never") { return "never cut off"; }
    if (f.cutoff_words === "always") { return "no dry route at any level"; }
    if (f.island_from === null || f.island_from === undefined) { return "–"; }
    if (!(f.island_to === null || f.island_from < f.island_to)) { return "cut off only as it floods"; }
    return fmt(f.island_from) + " to " + (f.island_to === null ? "never wet" : fmt(f.island_to)) + " " + unit;
  }

  // ------------------------------------------------------------------ cut-off ground

  function showCutOff() {
    if (!info || !info.cutoff) { return; }
    var v = offsetMode ? null : level;
    if (cutLayer) { map.removeLayer(cutLayer); cutLayer = null; }
    if (v === null) { return; }  // the cut-off stage is for one level across the site
    cutLayer = L.tileLayer(tileUrl("cutoff", v), { maxZoom: 21, className: "cutoff-tiles" });
    cutLayer.on("load", function () { document.body.dataset.cutoffLevel = v.toFixed(3); });
    cutLayer.addTo(map);
  }

  function addLegend() {
    var legend = document.getElementById("legend");
    if (!legend || !info.cutoff) { return; }
    var c = info.cutoff.legend;
    var row = S.el("div", { class: "legend-row", id: "legend-cutoff" }, [
      S.el("span", { class: "swatch", style: "background:" + c.colour + ";opacity:" + c.opacity +
        ";display:inline-block;width:14px;height:10px;margin-right:6px" }),
      S.el("span", { text: c.label }),
    ]);
    legend.appendChild(row);
  }

  // ------------------------------------------------------------------ assets

  function loadFigures() {
    var v = level;
    return S.getJSON(base + "/reach/assets?level=" + encodeURIComponent(v.toFixed(3))).then(function (res) {
      figures = {};
      res.assets.forEach(function (f) { figures[f.index] = f; });
      renderTable();
      extendPopups();
    }).catch(function (err) { S.show(document.getElementById("reach-error"), err.message); });
  }

  function renderTable() {
    var body = document.getElementById("reach-assets").tBodies[0];
    body.innerHTML = "";
    Object.keys(figures).forEach(function (k) {
      var f = figures[k], cells = [S.el("td", { text: f.name })];
      if (info.profile) { cells.push(S.el("td", { text: f.onset_offset === null || f.onset_offset === undefined ? "–" : signed(f.onset_offset) })); }
      if (info.cutoff) {
        cells.push(S.el("td", { text: windowText(f) }));
        cells.push(S.el("td", { text: f.island_now ? "island" : "" }));
      }
      body.appendChild(S.el("tr", { "data-index": String(f.index) }, cells));
    });
  }

  function popupExtra(f) {
    if (!f) { return ""; }
    var rows = [];
    if (info.profile && f.onset_offset !== undefined) {
      rows.push(["Onset offset", f.onset_offset === null ? "never wet" : signed(f.onset_offset) + " on the profile"]);
    }
    if (info.cutoff) {
      rows.push(["Island window", windowText(f)]);
      if (f.cut_at) { rows.push(["Last route cut at", "x " + f.cut_at.x.toFixed(1) + ", y " + f.cut_at.y.toFixed(1)]); }
    }
    var esc = function (s) { return String(s).replace(/[&<>"']/g, function (c) { return "&#" + c.charCodeAt(0) + ";"; }); };
    return '<table class="popup-table reach-popup">' + rows.map(function (r) {
      return "<tr><th>" + esc(r[0]) + "</th><td>" + esc(r[1]) + "</td></tr>";
    }).join("") + "</table>";
  }

  function extendPopups() {
    Object.keys(markers).forEach(function (k) {
      var m = markers[k], popup = m.getPopup();
      if (!popup) { return; }
      if (!m._sillmarkPlainPopup) { m._sillmarkPlainPopup = popup._content; }
      var plain = m._sillmarkPlainPopup;
      m.setPopupContent(function (layer) {
        return (typeof plain === "function" ? plain(layer) : plain) + popupExtra(figures[k]);
      });
    });
  }

  // ------------------------------------------------------------------ the profile

  function showOffset() {
    if (offsetLayer) { map.removeLayer(offsetLayer); offsetLayer = null; }
    if (!offsetMode) { if (!map.hasLayer(waterGroup)) { map.addLayer(waterGroup); } return; }
    if (map.hasLayer(waterGroup)) { map.removeLayer(waterGroup); }
    var d = offset;
    offsetLayer = L.tileLayer(tileUrl("offset", d), { maxZoom: 21, className: "offset-tiles" });
    offsetLayer.on("load", function () { document.body.dataset.offset = d.toFixed(3); });
    offsetLayer.addTo(map);
  }

  function drawProfile() {
    var p = info.profile, lift = offsetMode ? offset : 0;
    var canvas = document.getElementById("profile-chart");
    var levels = p.level.map(function (v) { return v + lift; });
    var stations = p.stations.map(function (s) { return s.chainage; });
    chart = new window.SillmarkChart.LineChart(canvas, {
      xLabel: "chainage along the river (" + info.chainage_unit + ")",
      left: { label: "water level (" + unit + (config.datum ? " above " + config.datum : ", datum not stated") + ")" },
      right: null,
      series: [
        { x: p.chainage, y: levels, axis: "left", colour: "#1d5f8a", width: 2 },
        { x: stations, y: p.stations.map(function (s) { return s.level + lift; }), axis: "left",
          colour: "#b5502a", width: 0, points: true },
      ],
      marker: null,
    });
    document.getElementById("profile-stations").textContent = "Stations: " + p.stations.map(function (s) {
      return s.name + " at " + s.chainage.toFixed(0) + " " + info.chainage_unit + ", " + (s.level + lift).toFixed(2) + " " + unit;
    }).join("; ") + ".";
  }

  function build() {
    var parts = [S.el("h2", { text: info.profile && info.cutoff ? "River profile and islands" : info.profile ? "River profile" : "Places that become islands" }),
      S.el("p", { class: "message error-box small", id: "reach-error", role: "alert", hidden: "hidden" })];
    if (info.profile) {
      var r = info.offset_range, lo = Math.floor(Math.min(r[0], 0) * 10) / 10 - 0.5, hi = Math.ceil(r[1] * 10) / 10;
      var toggle = S.el("input", { type: "checkbox", id: "offset-mode" });
      var slide = S.el("input", { type: "range", id: "offset-slider", class: "slider", min: String(lo),
        max: String(hi), step: "0.05", value: "0", disabled: "disabled" });
      var echo = S.el("span", { id: "offset-echo", text: signed(0) });
      parts.push(S.el("label", { class: "small" }, [toggle, " Offset mode: raise or lower the whole design profile"]));
      parts.push(S.el("div", {}, [slide, " ", echo]));
      parts.push(S.el("canvas", { id: "profile-chart", width: "320", height: "180", "aria-label": "The design profile along the river" }));
      parts.push(S.el("p", { class: "small muted", id: "profile-stations" }));
      toggle.addEventListener("change", function () {
        offsetMode = toggle.checked;
        if (offsetMode) { slide.removeAttribute("disabled"); } else { slide.setAttribute("disabled", "disabled"); }
        document.body.dataset.levelMode = offsetMode ? "offset" : "level";
        showOffset(); showCutOff(); drawProfile();
      });
      slide.addEventListener("input", function () {
        offset = parseFloat(slide.value);
        echo.textContent = signed(offset);
        showOffset(); drawProfile();
      });
    }
    if (info.cutoff) {
      parts.push(S.el("p", { class: "small muted", text: "Cut-off ground at the current level is drawn on the map" +
        (info.cutoff.roads ? " (routes keep to the roads given)." : ".") }));
    }
    var head = [S.el("th", { text: "Asset" })];
    if (info.profile) { head.push(S.el("th", { text: "Onset offset", title: "Rise of the whole profile at which it gets wet (" + unit + ")" })); }
    if (info.cutoff) { head.push(S.el("th", { text: "Island window" }), S.el("th", { text: "Now" })); }
    parts.push(S.el("div", { class: "table-wrap" }, [S.el("table", { class: "data", id: "reach-assets" },
      [S.el("thead", {}, [S.el("tr", {}, head)]), S.el("tbody")])]));
    parts.forEach(function (p) { panel.appendChild(p); });
    panel.hidden = false;
    if (info.profile) { drawProfile(); }
    addLegend();
  }

  document.addEventListener("sillmark:level", function (ev) {
    level = ev.detail.level;
    showCutOff();
    if (info) { loadFigures(); }
  });
  document.addEventListener("sillmark:assets", function (ev) {
    markers = ev.detail.markers || {};
    if (info) { extendPopups(); }
  });

  S.getJSON(base + "/reach").then(function (res) {
    if (!res.profile && !res.cutoff) { return; }
    info = res;
    build();
    showCutOff();
    loadFigures();
  }).catch(function () { /* a site without results yet: nothing to add */ });
})();
