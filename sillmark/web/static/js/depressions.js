/* Sillmark: the depressions of the site page, kept bounded whatever their number.
 *
 * - On the map, depressions and spill points are map tiles drawn by the server,
 *   the same at every level (the water-level map shows their state); only when
 *   the view holds few depressions large enough to pick are they also drawn one
 *   by one, to be clicked, and restyled by their state at each level.
 * - The table is one page at a time, sorted and filtered by the server.
 * Nothing here ever asks for the whole inventory. site.js calls
 * window.SillmarkDepressions(context) once and then view.setLevel(v, source). */
(function () {
  "use strict";

  /* Depressions drawn one by one: at most FEW of those in view, largest first, and
   * only those big enough to pick (PICK_PIXELS screen pixels, e.g. 20 × 20);
   * the others are in the map tiles. */
  var FEW = 150;
  var PICK_PIXELS = 400;
  /* Ground size of one screen pixel at a zoom and latitude (Web Mercator). */
  function pixelMetres(zoom, lat) { return 40075016.686 * Math.cos(lat * Math.PI / 180) / Math.pow(2, zoom + 8); }
  var PER_PAGE = 25;

  function escapeHtml(s) {
    return String(s).replace(/[&<>"']/g, function (c) {
      return { "&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;" }[c];
    });
  }

  function popupTable(title, rows) {
    var html = '<div class="popup"><h4>' + escapeHtml(title) + "</h4><table>";
    rows.forEach(function (r) { html += "<tr><th>" + escapeHtml(r[0]) + "</th><td>" + escapeHtml(r[1]) + "</td></tr>"; });
    return html + "</table></div>";
  }

  function SillmarkDepressions(ctx) {
    var S = window.Sillmark;
    var map = ctx.map, unit = ctx.unit, at = ctx.at, base = ctx.base, levelText = ctx.levelText;
    var areas = ctx.areas;  /* the site's area and volume units (common.js: metric or feet) */
    var level = ctx.level;
    var $ = function (id) { return document.getElementById(id); };
    var selected = null;
    var known = {};  /* id -> row, for the rows and features this page has seen */

    function stateAt(d) {
      if (d.spill_elevation <= level) { return "overtopped"; }
      if (d.pit_elevation < level) { return "cut off"; }
      return "dry";
    }

    // ---------------------------------------------------------------- tiles

    /* The same at every level: the water-level map shows each depression's state. */
    L.tileLayer("/tiles/" + ctx.siteId + "/depressions/{z}/{x}/{y}.png?run=" + ctx.runId,
      { maxZoom: 21, className: "depression-tiles", bounds: ctx.bounds }).addTo(ctx.group);
    L.tileLayer("/tiles/" + ctx.siteId + "/spill_points/{z}/{x}/{y}.png?run=" + ctx.runId,
      { maxZoom: 21, className: "spill-tiles", bounds: ctx.bounds }).addTo(ctx.spills);

    // ---------------------------------------------------------------- features in view

    var outlines = {}, featureLayer = null, markers = [], viewSeq = 0;

    function outlineStyle(d) {
      var st = stateAt(d), wide = selected === d.id;
      var c = "depression-outline";
      if (st === "overtopped") { return { color: "#1f4e79", weight: wide ? 3.5 : 1.6, fill: false, dashArray: null, className: c }; }
      if (st === "cut off") { return { color: "#a85d0c", weight: wide ? 3.5 : 1.8, fill: false, dashArray: "6 4", className: c }; }
      return { color: "#56636b", weight: wide ? 3.5 : 1.2, fill: false, dashArray: "2 4", className: c };
    }

    function restyle() {
      Object.keys(outlines).forEach(function (id) {
        if (known[id]) { outlines[id].setStyle(outlineStyle(known[id])); }
      });
    }

    function popup(d) {
      var st = stateAt(d);
      return popupTable("Depression " + d.id, [
        ["Lowest ground", at(d.pit_elevation)],
        ["Spill elevation", at(d.spill_elevation)],
        ["Deepest water when full", S.level(d.max_depth, unit)],
        ["Area when full", S.areaLarge(d.area_m2, areas)],
        ["Storage when full", S.volume(d.volume_m3, areas)],
        ["Spills into", d.spills_to ? "depression " + d.spills_to : "an outlet"],
        ["At " + S.level(level, unit), st + (st !== "overtopped" ? ", " + S.level(d.spill_elevation - level, unit) + " to spare" : "")],
      ]);
    }

    function clearFeatures() {
      if (featureLayer) { ctx.group.removeLayer(featureLayer); featureLayer = null; }
      markers.forEach(function (m) { ctx.spills.removeLayer(m); });
      markers = [];
      outlines = {};
    }

    function loadView() {
      var seq = ++viewSeq;
      var b = map.getBounds();
      var bbox = [b.getWest(), b.getSouth(), b.getEast(), b.getNorth()].map(function (v) { return v.toFixed(7); }).join(",");
      var px = pixelMetres(map.getZoom(), map.getCenter().lat);
      var minArea = (PICK_PIXELS * px * px).toPrecision(3);
      return S.getJSON(base + "/depressions.geojson?limit=" + FEW + "&min_area_m2=" + minArea +
          "&bbox=" + bbox).then(function (fc) {
        if (seq !== viewSeq) { return; }
        clearFeatures();
        var note = $("depressions-view-note");
        if (!fc.in_view) {
          note.textContent = "No depression large enough to pick in view; the smaller ones are on the map tiles.";
        } else if (fc.more_not_shown > 0) {
          note.textContent = "The " + fc.shown + " largest of " + fc.in_view + " depressions in view are drawn one by one " +
            "(click one for its figures); the others are on the map tiles.";
        } else {
          note.textContent = fc.in_view + " depression" + (fc.in_view > 1 ? "s" : "") +
            " large enough to pick in view; click one for its figures. Smaller ones are on the map tiles.";
        }
        fc.features.forEach(function (f) { known[f.properties.id] = f.properties; });
        featureLayer = L.geoJSON(fc, {
          style: function (f) { return outlineStyle(known[f.properties.id]); },
          onEachFeature: function (f, layer) {
            var id = f.properties.id;
            outlines[id] = layer;
            layer.bindPopup(function () { return popup(known[id]); }, { maxWidth: 320 });
            layer.on("click", function (ev) { L.DomEvent.stopPropagation(ev); select(id, false); layer.openPopup(ev.latlng); });
          },
        });
        ctx.group.addLayer(featureLayer);
        fc.features.forEach(function (f) {
          var d = f.properties;
          if (d.spill_lat === null) { return; }
          /* The spill point's own shape (common.js), as the legend and the print show it. */
          var m = S.symbolMarker([d.spill_lat, d.spill_lon], "spill", { className: "spill-point" });
          m.bindTooltip("spill " + at(d.spill_elevation), { direction: "top", offset: [0, -4] });
          m.bindPopup(function () { return popup(known[d.id]); }, { maxWidth: 320 });
          m.on("click", function (ev) { L.DomEvent.stopPropagation(ev); select(d.id, false); m.openPopup(); });
          markers.push(m);
          ctx.spills.addLayer(m);
        });
        document.body.dataset.depressionFeatures = String(fc.features.length);
        document.body.dataset.depressionFeaturesZoom = String(map.getZoom());
      }).catch(function (err) {
        if (seq === viewSeq) { $("depressions-view-note").textContent = err.message; }
      });
    }

    var moveTimer = null;
    map.on("moveend", function () { clearTimeout(moveTimer); moveTimer = setTimeout(loadView, 150); });

    // ---------------------------------------------------------------- the paged table

    var table = $("depressions-table");
    var query = { page: 1, sort: "spill_elevation", order: "asc", q: "", min_depth: "" };
    var initial = table.querySelector("th.sorted-asc");
    if (initial) { query.sort = initial.dataset.key; }
    var pageSeq = 0;

    function tableUrl() {
      var p = ["page=" + query.page, "per_page=" + PER_PAGE, "sort=" + encodeURIComponent(query.sort),
        "order=" + query.order, "level=" + encodeURIComponent(levelText(level))];
      if (query.q) { p.push("q=" + encodeURIComponent(query.q)); }
      if (query.min_depth) { p.push("min_depth=" + encodeURIComponent(query.min_depth)); }
      return base + "/depressions?" + p.join("&");
    }

    function loadPage() {
      var seq = ++pageSeq, v = level;
      return S.getJSON(tableUrl()).then(function (res) {
        if (seq !== pageSeq) { return; }
        query.page = res.page;
        renderPage(res);
        document.body.dataset.depressionTableLevel = levelText(v);
      }).catch(function (err) {
        if (seq === pageSeq) { S.show($("depressions-error"), err.message); }
      });
    }

    function renderPage(res) {
      S.show($("depressions-error"), "");
      var body = table.tBodies[0];
      body.innerHTML = "";
      res.depressions.forEach(function (d) {
        known[d.id] = d;
        var tr = S.el("tr", { tabindex: "0", "data-id": String(d.id) }, [
          S.el("td", { text: String(d.id) }),
          S.el("td", { text: S.fixed(d.spill_elevation, 2) }),
          S.el("td", { text: S.fixed(d.max_depth, 2) }),
          S.el("td", { text: S.fixed(S.inLargeArea(d.area_m2, areas), 2) }),
          S.el("td", { text: S.fixed(S.inVolume(d.volume_m3, areas), areas && areas.volume_m3 !== 1 ? 2 : 0) }),
          S.el("td", {}, [S.el("span", { class: "state state-" + d.state.replace(" ", "-"), text: d.state })]),
        ]);
        if (selected === d.id) { tr.classList.add("selected"); }
        tr.addEventListener("click", function () { select(d.id, true); });
        tr.addEventListener("keydown", function (ev) { if (ev.key === "Enter") { select(d.id, true); } });
        body.appendChild(tr);
      });
      // Without "every depression", the table holds the listed (significant) ones only.
      var shown = res.every || res.listed === undefined ? res.total : res.listed;
      var filtered = res.matched !== shown;
      $("depressions-count").textContent = (filtered ? res.matched + " of " + shown : String(shown)) +
        (res.every || !res.below_minimum ? "" : " listed") +
        " depression" + (shown === 1 ? "" : "s") + (filtered ? " match" : "") +
        (res.every || !res.below_minimum ? "" : " (" + res.below_minimum + " below the minimum not listed)") +
        (res.pages > 1 ? " · page " + res.page + " of " + res.pages : "");
      $("depressions-prev").disabled = res.page <= 1;
      $("depressions-next").disabled = res.page >= res.pages;
    }

    table.querySelectorAll("th[data-key]").forEach(function (th) {
      th.tabIndex = 0;
      var go = function () {
        if (query.sort === th.dataset.key) { query.order = query.order === "asc" ? "desc" : "asc"; }
        else { query.sort = th.dataset.key; query.order = "asc"; }
        table.querySelectorAll("th").forEach(function (o) { o.classList.remove("sorted-asc", "sorted-desc"); });
        th.classList.add(query.order === "asc" ? "sorted-asc" : "sorted-desc");
        query.page = 1;
        loadPage();
      };
      th.addEventListener("click", go);
      th.addEventListener("keydown", function (ev) { if (ev.key === "Enter" || ev.key === " ") { ev.preventDefault(); go(); } });
    });
    $("depressions-prev").addEventListener("click", function () { query.page = Math.max(1, query.page - 1); loadPage(); });
    $("depressions-next").addEventListener("click", function () { query.page += 1; loadPage(); });
    $("depressions-filter").addEventListener("submit", function (ev) {
      ev.preventDefault();
      query.q = $("depressions-q").value.trim();
      query.min_depth = $("depressions-min-depth").value.trim();
      query.page = 1;
      loadPage();
    });

    // ---------------------------------------------------------------- one depression

    function select(id, zoom) {
      var d = known[id];
      if (!d) { return; }
      selected = id;
      restyle();
      table.querySelectorAll("tbody tr").forEach(function (tr) { tr.classList.toggle("selected", tr.dataset.id === String(id)); });
      if (zoom && d.bounds) {
        map.fitBounds([[d.bounds[1], d.bounds[0]], [d.bounds[3], d.bounds[2]]], { padding: [40, 40], maxZoom: 19 });
      }
      if (outlines[id]) { outlines[id].bringToFront(); }
      $("depression-detail").hidden = false;
      $("depression-detail-title").textContent = "Depression " + id;
      $("depression-detail-text").textContent = "Pit " + S.level(d.pit_elevation, unit) + ", spills at " +
        S.level(d.spill_elevation, unit) + " into " + (d.spills_to ? "depression " + d.spills_to : "an outlet") +
        "; holds " + S.volume(d.volume_m3, areas) + " over " + S.areaLarge(d.area_m2, areas) + " when full.";
      $("depression-curve-note").textContent = "Loading its stage–storage curve…";
      S.getJSON(base + "/depressions/" + id + "/curve").then(function (c) {
        if (selected !== id) { return; }
        new window.SillmarkChart.LineChart($("depression-chart"), {
          xLabel: "water level in the depression (" + unit + ")",
          left: { label: "storage (" + (areas ? areas.volume : "m³") + ")" },
          right: { label: "area (" + (areas ? areas.large_area : "ha") + ")" },
          series: [
            { x: c.level, y: c.storage_m3.map(function (v) { return S.inVolume(v, areas); }), axis: "left", colour: "#4a3a8c", width: 2 },
            { x: c.level, y: c.area_m2.map(function (v) { return S.inLargeArea(v, areas); }), axis: "right", colour: "#2f6fa3", width: 1.4, dash: [4, 3] },
          ],
          marker: level,
        });
        $("depression-curve-note").textContent = "Stage–storage (solid) and stage–area (dashed), exact for the DEM" +
          (c.nested_pools ? "; " + c.nested_pools + " smaller pool" + (c.nested_pools > 1 ? "s" : "") +
            " (pits and the pools they merge into) nest inside it." : ".");
      }).catch(function (err) {
        $("depression-curve-note").textContent = "Stage–storage curve not available: " + err.message;
      });
    }

    // ---------------------------------------------------------------- the level

    /* The state column of the rows shown, at the new level, without asking the server
     * (the rows carry their pit and spill elevations); the same rule as the server's. */
    function restateRows() {
      table.querySelectorAll("tbody tr").forEach(function (tr) {
        var d = known[tr.dataset.id];
        if (!d) { return; }
        var st = stateAt(d), span = tr.querySelector("span.state");
        span.className = "state state-" + st.replace(" ", "-");
        span.textContent = st;
      });
      document.body.dataset.depressionTableLevel = levelText(level);
    }

    var pageTimer = null, loaded = false;
    function setLevel(v, source) {
      level = v;
      restyle();
      clearTimeout(pageTimer);
      if (loaded && query.sort !== "state") { restateRows(); return; }
      loaded = true;
      pageTimer = setTimeout(loadPage, source === "slider" ? 250 : 0);
    }

    loadView();
    return { setLevel: setLevel, select: select };
  }

  window.SillmarkDepressions = SillmarkDepressions;
})();
