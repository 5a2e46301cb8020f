/* Sillmark: the site page — stage control, water-level tiles, figures, chart,
 * depressions, assets, routes and downloads. Talks only to this server. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var config = JSON.parse(document.getElementById("site-config").textContent);
  var N = config.names;
  var map = window[N.map];
  var groups = {
    water: window[N.water], depressions: window[N.depressions], spills: window[N.spills],
    assets: window[N.assets], route: window[N.route],
  };
  var unit = config.unit_symbol;
  var datum = config.datum || "";
  /* Area and volume units of the site (sillmark.units.area_units): m², ha, m³ or ft², acres, acre-ft. */
  var areas = config.areas;
  /* Levels (not depths) carry the vertical datum. */
  var at = function (v) { return S.levelAt(v, unit, datum); };
  var base = "/api/sites/" + config.site_id;
  var level = config.level;
  var range = config.range;
  var $ = function (id) { return document.getElementById(id); };

  // ------------------------------------------------------------------ level control

  var slider = $("level-slider"), number = $("level-number");

  function levelText(v) { return (Math.round(v * 1000) / 1000).toFixed(range.step < 0.01 ? 3 : 2); }

  function fromHash() {
    var m = /(?:^|[#&])level=([-+0-9.eE]+)/.exec(window.location.hash);
    if (m) { var v = parseFloat(m[1]); if (isFinite(v)) { return v; } }
    return null;
  }

  var timers = {};
  function later(name, ms, fn) {
    clearTimeout(timers[name]);
    timers[name] = setTimeout(fn, ms);
  }

  function setLevel(v, source) {
    if (typeof v !== "number" || !isFinite(v)) {
      S.show($("level-error"), "Give the level as a number in " + unit + ".");
      return;
    }
    if (v < range.min || v > range.max) { refuseLevel(v); return; }
    S.show($("level-error"), "");
    number.classList.remove("refused");
    delete document.body.dataset.levelRefused;
    level = v;
    if (source !== "number") { number.value = levelText(v); }
    if (source !== "slider") { slider.value = String(Math.min(Math.max(v, range.min), range.max)); }
    history.replaceState(null, "", "#level=" + levelText(v));
    $("print-link").href = "/sites/" + config.site_id + "/print?level=" + encodeURIComponent(levelText(v));
    document.querySelectorAll(".level-echo").forEach(function (n) { n.textContent = S.level(v, unit); });
    $("level-datum").textContent = at(v);
    if (chart) { chart.setMarker(v); }
    later("water", source === "slider" ? 60 : 0, function () { showWater(v); });
    later("figures", source === "slider" ? 90 : 0, function () { loadFigures(v); });
    later("assets", source === "slider" ? 250 : 0, function () { loadAssets(v); });
    if (depressionView) { depressionView.setLevel(v, source); }
    renderFiles();
    document.dispatchEvent(new CustomEvent("sillmark:level", { detail: { level: v } }));
  }

  /* A level outside the offered range (lowest outlet to highest ground): clear the
   * figures and the water layer, keep the last valid level, and say so. */
  function refuseLevel(v) {
    ["water", "figures", "assets"].forEach(function (name) { clearTimeout(timers[name]); });
    waterSeq++; figureSeq++;
    groups.water.clearLayers();
    waterFront = 0;
    clearFigures();
    number.classList.add("refused");
    delete document.body.dataset.waterLevel;
    delete document.body.dataset.figuresLevel;
    document.body.dataset.levelRefused = String(v);
    var where = v < range.min
      ? "below the lowest outlet (" + S.level(range.min, unit) + "): no water stands there"
      : "above the highest ground (" + S.level(range.max, unit) + "): the whole site is under water";
    S.show($("level-error"), S.level(v, unit) + " is " + where + ". Give a level from " +
      S.level(range.min, unit) + " to " + S.level(range.max, unit) + ". The level stays at " + at(level) +
      "; its figures and water layer are cleared until you give one in range.");
  }

  function clearFigures() {
    ["fig-flooded-area", "fig-flooded-volume", "fig-shielded-area", "fig-assets"].forEach(function (id) {
      $(id).textContent = "–";
    });
    ["fig-flooded-area-m2", "fig-flooded-volume-alt", "fig-shielded-volume", "fig-assets-sub", "fig-depressions"]
      .forEach(function (id) { $(id).textContent = ""; });
    delete $("fig-flooded-area").dataset.m2;
  }

  slider.addEventListener("input", function () { setLevel(parseFloat(slider.value), "slider"); });
  number.addEventListener("change", function () {
    var text = number.value.trim();
    setLevel(text === "" ? NaN : Number(text), "number");
  });
  number.addEventListener("keydown", function (ev) {
    if (ev.key === "Enter") { ev.preventDefault(); number.dispatchEvent(new Event("change")); }
  });
  $("level-down").addEventListener("click", function () { setLevel(+(level - range.step).toFixed(6), "button"); });
  $("level-up").addEventListener("click", function () { setLevel(+(level + range.step).toFixed(6), "button"); });

  // ------------------------------------------------------------------ water tiles (double-buffered)

  /* Tiles are asked for over the site only, never for the blank map around it. */
  function siteBounds() {
    var b = config.bounds;
    return b ? L.latLngBounds([b[1], b[0]], [b[3], b[2]]) : undefined;
  }

  var waterSeq = 0, waterFront = 0;
  function showWater(v) {
    var seq = ++waterSeq;
    var url = "/tiles/" + config.site_id + "/" + encodeURIComponent(levelText(v)) +
      "/{z}/{x}/{y}.png?run=" + config.run_id;
    var layer = L.tileLayer(url, { maxZoom: 21, className: "water-tiles", keepBuffer: 2, bounds: siteBounds() });
    layer._sillmarkSeq = seq;
    // Pending layers for older levels are no longer wanted.
    groups.water.eachLayer(function (l) {
      if (l._sillmarkSeq !== waterFront) { groups.water.removeLayer(l); }
    });
    layer.on("load", function () {
      if (seq < waterFront) { groups.water.removeLayer(layer); return; }
      waterFront = seq;
      groups.water.eachLayer(function (l) { if (l._sillmarkSeq < seq) { groups.water.removeLayer(l); } });
      document.body.dataset.waterLevel = levelText(v);
    });
    groups.water.addLayer(layer);
  }

  // ------------------------------------------------------------------ figures

  var figureSeq = 0;
  function loadFigures(v) {
    var seq = ++figureSeq;
    S.getJSON(base + "/stage?level=" + encodeURIComponent(levelText(v))).then(function (f) {
      if (seq !== figureSeq) { return; }
      showAreaFigures(f);
      if (f.assets) {
        $("fig-assets").textContent = f.assets.flooded + " of " + f.assets.total;
        $("fig-assets-sub").textContent = f.assets.shielded + " shielded · " + f.assets.dry + " dry" +
          (f.assets.without_figures ? " · " + f.assets.without_figures + " off the data" : "");
      } else {
        $("fig-assets").textContent = "–";
        $("fig-assets-sub").textContent = "no asset table";
      }
      var d = f.depressions;
      $("fig-depressions").textContent = (d.below_minimum ? "Listed depressions: " : "Depressions: ") +
        d.overtopped + " of " + d.total + " overtopped, " + d.cut_off + " below the level but cut off.";
      document.body.dataset.figuresLevel = levelText(v);
    }).catch(function (err) {
      if (seq === figureSeq) { S.show($("level-error"), err.message); }
    });
  }

  /* The panel's areas and volumes, in the site's own units. */
  function showAreaFigures(f) {
    $("fig-flooded-area").textContent = S.areaLarge(f.flooded_area_m2, areas);
    $("fig-flooded-area").dataset.m2 = String(f.flooded_area_m2);
    $("fig-flooded-area-m2").textContent = S.fixed(f.flooded_area_m2 / areas.small_area_m2, 0) + "\u202f" + areas.small_area;
    $("fig-flooded-volume").textContent = S.volume(f.flooded_volume_m3, areas);
    $("fig-flooded-volume-alt").textContent = "above the ground, reached from the outlets";
    $("fig-shielded-area").textContent = S.areaLarge(f.shielded_area_m2, areas);
    $("fig-shielded-volume").textContent = "would hold " + S.volume(f.shielded_volume_m3, areas);
  }

  // ------------------------------------------------------------------ stage chart

  var chart = null;
  S.getJSON(base + "/stage_table").then(function (t) {
    var large = function (a) { return a.map(function (v) { return S.inLargeArea(v, areas); }); };
    var vol = function (a) { return a.map(function (v) { return S.inVolume(v, areas); }); };
    chart = new window.SillmarkChart.LineChart($("stage-chart"), {
      xLabel: "outlet water level (" + unit + (datum ? " above " + datum : ", datum not stated") + ")",
      left: { label: "area (" + areas.large_area + ")" },
      right: { label: "volume (" + areas.volume + ")" },
      series: [
        { x: t.level, y: large(t.shielded_area_m2), axis: "left", colour: "#c97614", dash: [5, 3], width: 1.6 },
        { x: t.level, y: large(t.flooded_area_m2), axis: "left", colour: "#2f6fa3", width: 2.2 },
        { x: t.level, y: vol(t.flooded_volume_m3), axis: "right", colour: "#4a3a8c", width: 1.6, dash: [1, 0] },
      ],
      marker: level,
      onPick: function (x) { setLevel(Math.round(x / range.step) * range.step, "chart"); },
    });
  }).catch(function (err) { $("chart-heading").textContent = "Site stage chart (" + err.message + ")"; });

  // ------------------------------------------------------------------ sortable tables

  function sortable(table, rows, render) {
    var state = { key: null, dir: 1 };
    var initial = table.querySelector("th.sorted-asc");
    if (initial) { state.key = initial.dataset.key; }
    table.querySelectorAll("th[data-key]").forEach(function (th) {
      th.tabIndex = 0;
      var go = function () {
        if (state.key === th.dataset.key) { state.dir = -state.dir; } else { state.key = th.dataset.key; state.dir = 1; }
        table.querySelectorAll("th").forEach(function (o) { o.classList.remove("sorted-asc", "sorted-desc"); });
        th.classList.add(state.dir > 0 ? "sorted-asc" : "sorted-desc");
        render();
      };
      th.addEventListener("click", go);
      th.addEventListener("keydown", function (ev) { if (ev.key === "Enter" || ev.key === " ") { ev.preventDefault(); go(); } });
    });
    return function sorted() {
      var key = state.key, dir = state.dir;
      var list = rows().slice();
      if (!key) { return list; }
      var th = table.querySelector('th[data-key="' + key + '"]');
      var numeric = th && th.dataset.type === "num";
      list.sort(function (a, b) {
        var x = a[key], y = b[key];
        if (x === null || x === undefined) { return 1; }
        if (y === null || y === undefined) { return -1; }
        if (numeric) { return (x - y) * dir; }
        return String(x).localeCompare(String(y)) * dir;
      });
      return list;
    };
  }

  // ------------------------------------------------------------------ depressions (depressions.js)

  var depressionView = window.SillmarkDepressions({
    map: map, group: groups.depressions, spills: groups.spills, base: base, siteId: config.site_id,
    runId: config.run_id, unit: unit, at: at, levelText: levelText, level: level, bounds: siteBounds(),
    areas: areas,
  });

  function popupTable(title, rows, extra) {
    var html = '<div class="popup"><h4>' + escapeHtml(title) + "</h4><table>";
    rows.forEach(function (r) { html += "<tr><th>" + escapeHtml(r[0]) + "</th><td>" + escapeHtml(r[1]) + "</td></tr>"; });
    return html + "</table>" + (extra || "") + "</div>";
  }

  function escapeHtml(s) {
    return String(s).replace(/[&<>"']/g, function (c) {
      return { "&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;" }[c];
    });
  }

  // ------------------------------------------------------------------ assets

  var assets = [], assetMarkers = {}, selectedAsset = null, assetSeq = 0;

  var assetRows = sortable($("assets-table"), function () { return assets; }, renderAssetTable);

  function assetPopup(a) {
    var rows = [["Kind", a.kind || "–"], ["Ground", at(a.ground_elevation)],
      ["Onset stage", at(a.onset_stage)]];
    if (a.state === "flooded") { rows.push(["Depth at " + S.level(level, unit), S.level(a.depth, unit)]); }
    else if (a.state === "shielded") { rows.push(["Below the level by", S.level(a.depth_if_reached, unit) + " (shielded)"]); }
    else if (a.status === "ok") { rows.push(["Freeboard", S.level(a.freeboard, unit)]); }
    if (a.status !== "ok") { rows.push(["Placement", a.status]); }
    else {
      rows.push(["Controlling sill", a.sill_is_own_cell ? "its own ground" : at(a.sill_elevation)]);
    }
    var extra = a.status === "ok" ? '<p><a href="#" class="barrier-link" data-index="' + a.index + '">Plan a barrier…</a></p>' : "";
    return popupTable(a.name, rows, extra);
  }

  function renderAssetTable() {
    var body = $("assets-table").tBodies[0];
    body.innerHTML = "";
    assetRows().forEach(function (a) {
      var tr = S.el("tr", { tabindex: "0" }, [
        S.el("td", {}, [a.name, S.el("div", { class: "muted small", text: a.kind || "" })]),
        S.el("td", { text: S.fixed(a.ground_elevation, 2) }),
        S.el("td", { text: S.fixed(a.onset_stage, 2) }),
        S.el("td", { text: S.fixed(a.freeboard, 2) }),
        S.el("td", {}, [S.el("span", { class: "state state-" + (a.state || "none"), text: a.state || a.status })]),
      ]);
      if (selectedAsset === a.index) { tr.classList.add("selected"); }
      tr.addEventListener("click", function () { selectAsset(a.index, true); });
      tr.addEventListener("keydown", function (ev) { if (ev.key === "Enter") { selectAsset(a.index, true); } });
      body.appendChild(tr);
    });
  }

  function loadAssets(v) {
    var seq = ++assetSeq;
    return S.getJSON(base + "/assets?level=" + encodeURIComponent(levelText(v))).then(function (res) {
      if (seq !== assetSeq) { return; }
      assets = res.assets;
      $("assets-source").textContent = res.source
        ? res.source.count + " assets from " + res.source.name + ", at " + S.level(res.level, unit) + "."
        : "No asset table yet. Upload one to see when each place gets wet.";
      groups.assets.clearLayers();
      assetMarkers = {};
      assets.forEach(function (a) {
        if (a.lat === null || a.lon === null) { return; }
        var m = S.symbolMarker([a.lat, a.lon], "asset-" + (a.state || "none"), { className: "asset-marker" });
        m.bindTooltip(a.name, { direction: "top", offset: [0, -6] });
        m.bindPopup(function () { return assetPopup(a); }, { maxWidth: 320 });
        m.on("click", function (ev) { L.DomEvent.stopPropagation(ev); selectAsset(a.index, false); m.openPopup(); });
        assetMarkers[a.index] = m;
        groups.assets.addLayer(m);
      });
      renderAssetTable();
      renderFiles();
      document.dispatchEvent(new CustomEvent("sillmark:assets", { detail: { markers: assetMarkers } }));
    }).catch(function (err) { S.show($("assets-error"), err.message); });
  }

  function selectAsset(index, zoom) {
    var a = assets.find(function (x) { return x.index === index; });
    if (!a) { return; }
    selectedAsset = index;
    renderAssetTable();
    if (zoom && a.lat !== null) { map.setView([a.lat, a.lon], Math.max(map.getZoom(), 17)); }
    if (assetMarkers[index]) { assetMarkers[index].openPopup(); }
    if (S.onAssetChosen) { S.onAssetChosen(a); }  // the barrier planner (barrier.js)
  }

  document.addEventListener("click", function (ev) {
    var link = ev.target.closest && ev.target.closest(".barrier-link");
    if (!link) { return; }
    ev.preventDefault();
    openTab("tab-assets");
    selectAsset(parseInt(link.dataset.index, 10), false);
  });

  $("assets-form").addEventListener("submit", function (ev) {
    ev.preventDefault();
    var file = $("assets-file").files[0];
    if (!file) { S.show($("assets-error"), "Choose a CSV or GeoJSON file of assets first."); return; }
    var form = new FormData();
    form.append("assets", file, file.name);
    S.show($("assets-error"), "");
    S.getJSON(this.action, { method: "POST", body: form }).then(function (res) {
      $("assets-file").value = "";
      loadAssets(level);
      loadFigures(level);
      renderFiles();
      var counts = Object.keys(res.status_counts).map(function (k) { return res.status_counts[k] + " " + k; }).join(", ");
      $("assets-source").textContent = res.count + " assets read from " + res.original_name + " (" + counts + ").";
    }).catch(function (err) { S.show($("assets-error"), err.message); });
  });

  // ------------------------------------------------------------------ outlets

  S.outlets(window[N.outlets], base + "/outlets.geojson");

  // ------------------------------------------------------------------ click: the route to a point

  function addSill(s, text) {
    S.symbolMarker([s.lat, s.lon], "sill", { className: "sill-marker" })
      .bindTooltip(text, { permanent: true, direction: "right", offset: [10, 0], className: "sill-label" })
      .addTo(groups.route);
  }

  var routeSeq = 0;

  /* Remove the previous click's route and sill at once, so nothing stale shows while the next loads. */
  function clearRoute() {
    groups.route.clearLayers();
    delete document.body.dataset.routeCells;
    delete document.body.dataset.routeLength;
    document.body.dataset.routeState = "loading";
  }

  /* The route as people read it: its length on the ground and where it starts. */
  function routeText(c) {
    var from = c.reaches_outlet ? "an outlet" : "the edge of the data";
    if (c.route_cells <= 1) { return "the point is itself where the water is set"; }
    return S.length(c.route_length, c.route_length_unit) + " along the ground from " + from;
  }

  /* Where the point is: coordinates in the DEM's CRS, then WGS 84. */
  function positionRows(c) {
    var sep = c.xy_unit === "°" ? "" : "\u202f";
    return [
      ["Position, " + c.crs, "x " + c.x.toFixed(c.xy_decimals) + sep + c.xy_unit + ", y " +
        c.y.toFixed(c.xy_decimals) + sep + c.xy_unit],
      ["Longitude, latitude (WGS 84)", S.fixed(c.lon, 6) + "°, " + S.fixed(c.lat, 6) + "°"],
    ];
  }

  map.on("click", function (ev) {
    // Clicks place a water body's corners (waterbody.js), a place's (barrier.js) or an
    // edit's vertices (drawedits.js).
    if (S.tracing || S.outlining || S.drawingEdits) { return; }
    var ll = ev.latlng.wrap();
    var url = base + "/cell?lon=" + ll.lng.toFixed(8) + "&lat=" + ll.lat.toFixed(8) +
      "&level=" + encodeURIComponent(levelText(level));
    var seq = ++routeSeq;
    clearRoute();
    var popup = L.popup({ maxWidth: 340 }).setLatLng(ev.latlng).setContent("Tracing the route…").openOn(map);
    S.getJSON(url).then(function (c) {
      if (seq !== routeSeq) { return; }  // a later click is loading its own route
      groups.route.clearLayers();
      if (c.route.coordinates.length > 1) {
        L.geoJSON(c.route, { style: { color: "#14232c", weight: 3.5, opacity: 0.9, className: "route-line" } }).addTo(groups.route);
        L.geoJSON(c.route, { style: { color: "#ffffff", weight: 1.2, opacity: 0.9, dashArray: "2 6" } }).addTo(groups.route);
      }
      L.circleMarker([c.lat, c.lon], { radius: 4, color: "#14232c", weight: 2, fillColor: "#fff", fillOpacity: 1 }).addTo(groups.route);
      addSill(c.sill, c.sill.is_own_cell ? "its own ground controls (" + at(c.sill.elevation) + ")"
        : "controlling sill " + at(c.sill.elevation));
      var rows = [
        ["Elevation", at(c.elevation)],
        ["Onset stage", at(c.onset_stage)],
        ["At " + at(c.level), c.state === "flooded" ? "flooded, " + S.level(c.depth, unit) + " deep"
          : c.state === "shielded" ? "shielded: " + S.level(c.depth_if_reached, unit) + " below the level, no path yet"
            : "dry, " + S.level(c.freeboard, unit) + " to spare"],
        ["Controlling sill", c.sill.is_own_cell ? "the point itself" : at(c.sill.elevation)],
        ["Route", routeText(c)],
        ["In depression", c.depression_id ? String(c.depression_id) : "none"],
      ];
      rows.push.apply(rows, positionRows(c));
      popup.setContent(popupTable("This point", rows));
      document.body.dataset.routeCells = String(c.route_cells);
      document.body.dataset.routeLength = String(c.route_length);
      document.body.dataset.routeState = "shown";
    }).catch(function (err) {
      if (seq !== routeSeq) { return; }
      document.body.dataset.routeState = "failed";
      popup.setContent('<div class="popup"><p>' + escapeHtml(err.message) + "</p></div>");
    });
  });

  // ------------------------------------------------------------------ files

  function renderFiles() {
    var list = $("level-files");
    if (!list) { return; }
    var t = encodeURIComponent(levelText(level));
    var at = base + "/files/level/" + t;
    var items = [
      ["depth", "depth of water (GeoTIFF)"], ["water_state", "dry / flooded / shielded per cell (GeoTIFF)"],
      ["flood_extent", "flooded outline (GeoJSON)"], ["shielded", "shielded low ground outline (GeoJSON)"],
      ["depressions", "each depression's state and freeboard (CSV)"],
    ];
    if (assets.length) { items.push(["assets_csv", "assets at this level (CSV)"], ["assets_geojson", "assets, routes and sills (GeoJSON)"]); }
    list.innerHTML = "";
    items.forEach(function (it) {
      list.appendChild(S.el("li", {}, [S.el("a", { href: at + "/" + it[0], download: "" , text: it[0].replace("_", " ") }), " ",
        S.el("span", { class: "muted", text: it[1] })]));
    });
    list.appendChild(S.el("li", {}, [S.el("a", { href: at + ".zip", download: "", text: "all of these (ZIP)" })]));
  }

  // ------------------------------------------------------------------ tabs, legend, run strip

  function openTab(id) {
    document.querySelectorAll(".tab").forEach(function (t) {
      var on = t.dataset.tab === id;
      t.classList.toggle("active", on);
      t.setAttribute("aria-selected", on ? "true" : "false");
    });
    document.querySelectorAll(".tab-panel").forEach(function (p) { p.hidden = p.id !== id; });
  }
  document.querySelectorAll(".tab").forEach(function (t) {
    t.addEventListener("click", function () { openTab(t.dataset.tab); });
  });

  showLegend();

  /* The legend: folded below the map on tablets and phones (common.js). Leaflet is
   * told when the map's box changes, so no grey band is left where tiles belong. */
  function showLegend() {
    S.legend($("legend"), config.legend);
    if (window.matchMedia) {
      var narrow = window.matchMedia("(max-width: 1024px)");
      var resize = function () { map.invalidateSize(); };
      if (narrow.addEventListener) { narrow.addEventListener("change", resize); }
    }
    $("legend").addEventListener("click", function () { setTimeout(function () { map.invalidateSize(); }, 0); });
  }

  var strip = $("run-strip");
  function followRun() {
    var poll = function () {
      S.getJSON(strip.dataset.statusUrl).then(function (st) {
        if (st.current_run !== config.run_id) { window.location.reload(); return; }
        var r = st.run;
        if (r && (r.status === "queued" || r.status === "running")) {
          strip.textContent = "A new analysis is " + r.status + ": " + r.phase + " (" + Math.round(r.percent) + " %).";
          setTimeout(poll, 2000);
        } else if (r && r.status === "failed") {
          strip.textContent = "The latest analysis failed: " + r.message + " Showing the results of the earlier run.";
        }
      }).catch(function () { setTimeout(poll, 5000); });
    };
    strip.hidden = false;
    setTimeout(poll, 1500);
  }
  if (strip && !strip.hidden) { followRun(); }
  S.followRun = function (message) { strip.textContent = message; followRun(); };

  map.on("click", function () { var hint = $("map-hint"); if (hint) { hint.hidden = true; } });

  var start = fromHash();
  setLevel(start !== null ? start : level, "init");
})();
