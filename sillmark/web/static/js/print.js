/* Sillmark: the printed report. The server has put every figure on the page; this
 * script draws the map (water level, outlets, routes, controlling sills, spill
 * points, named assets), fits the site to the sheet, and draws the stage chart.
 * When all of it has loaded it sets body[data-print-ready]. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var config = JSON.parse(document.getElementById("site-config").textContent);
  var N = config.names;
  var map = window[N.map];
  var draw = config.draw || { assets: [], spills: [] };
  var unit = config.unit_symbol;
  var text = config.level.toFixed(2);
  var base = "/api/sites/" + config.site_id;
  var waiting = { water: true, chart: true };

  function done(what) {
    waiting[what] = false;
    if (!waiting.water && !waiting.chart) { document.body.dataset.printReady = "1"; }
  }

  // ------------------------------------------------------------------ the site, fitted to the sheet

  /* The site's bounds fill the map frame: fractional zoom, so no corner is left empty
   * because the next whole zoom level would not fit. */
  function fitSite() {
    var b = config.bounds;
    if (!b) { return; }
    map.options.zoomSnap = 0.1;
    map.invalidateSize(false);
    map.fitBounds([[b[1], b[0]], [b[3], b[2]]], { padding: [6, 6], animate: false });
  }
  fitSite();
  /* The sheet keeps its size on paper (print.css), but a browser may still lay the page
   * out again before printing: keep the view's centre where it was. */
  window.addEventListener("beforeprint", function () { map.invalidateSize({ pan: false }); });

  // ------------------------------------------------------------------ layers

  var water = L.tileLayer("/tiles/" + config.site_id + "/" + encodeURIComponent(text) + "/{z}/{x}/{y}.png?run=" +
    config.run_id, { maxZoom: 21, className: "water-tiles" });
  water.on("load", function () { done("water"); });
  water.addTo(window[N.water]);
  S.legend(document.getElementById("legend"), config.legend, { assets: draw.assets.length > 0 });
  S.outlets(window[N.outlets], base + "/outlets.geojson");

  var routes = window[N.route];
  var seenSills = {};
  draw.assets.forEach(function (a) {
    if (a.route && a.route.length > 1) {
      var line = a.route.map(function (p) { return [p[1], p[0]]; });
      L.polyline(line, { color: "#14232c", weight: 2.6, opacity: 0.9, className: "route-line", interactive: false }).addTo(routes);
      L.polyline(line, { color: "#ffffff", weight: 1, opacity: 0.9, dashArray: "2 5", interactive: false }).addTo(routes);
    }
    if (a.sill && !a.sill.own) {
      var key = a.sill.lon.toFixed(7) + "," + a.sill.lat.toFixed(7);
      if (!seenSills[key]) {
        seenSills[key] = true;
        L.circleMarker([a.sill.lat, a.sill.lon], {
          radius: 6, color: "#3b1f00", weight: 2, fillColor: "#ff8c1a", fillOpacity: 1, className: "sill-marker",
        }).bindTooltip("sill " + a.sill.text, { permanent: false }).addTo(routes);
      }
    }
  });

  draw.spills.forEach(function (p) {
    L.circleMarker([p.lat, p.lon], {
      radius: 4, color: "#2b2118", weight: 1.2, fillColor: "#e0b043", fillOpacity: 1, className: "spill-point",
    }).bindTooltip(p.text).addTo(window[N.spills]);
  });

  var fill = { flooded: "#2f6fa3", shielded: "#d98a1c", dry: "#6f8f5a" };
  draw.assets.forEach(function (a) {
    L.circleMarker([a.lat, a.lon], {
      radius: 5, color: "#fff", weight: 1.5, fillColor: fill[a.state] || "#888", fillOpacity: 1, className: "asset-marker",
    }).bindTooltip(a.name, { permanent: true, direction: "right", offset: [6, 0], className: "asset-label" })
      .addTo(window[N.assets]);
  });

  // ------------------------------------------------------------------ the site stage chart

  var ACRE_M2 = 4046.8564224, ACRE_FOOT_M3 = 43560 * Math.pow(0.3048, 3);
  var area = config.is_feet ? function (v) { return v / ACRE_M2; } : function (v) { return v / 1e4; };
  var volume = config.is_feet ? function (v) { return v / ACRE_FOOT_M3; } : function (v) { return v; };
  var areaUnit = config.is_feet ? "acres" : "ha", volumeUnit = config.is_feet ? "acre-ft" : "m³";
  S.getJSON(base + "/stage_table").then(function (t) {
    new window.SillmarkChart.LineChart(document.getElementById("print-chart"), {
      xLabel: "outlet water level (" + unit + (config.datum ? " above " + config.datum : ", datum not stated") + ")",
      left: { label: "area (" + areaUnit + ")" },
      right: { label: "volume (" + volumeUnit + ")" },
      series: [
        { x: t.level, y: t.shielded_area_m2.map(area), axis: "left", colour: "#c97614", dash: [5, 3], width: 1.4 },
        { x: t.level, y: t.flooded_area_m2.map(area), axis: "left", colour: "#2f6fa3", width: 2 },
        { x: t.level, y: t.flooded_volume_m3.map(volume), axis: "right", colour: "#4a3a8c", width: 1.4 },
      ],
      marker: config.level,
    });
    done("chart");
  }).catch(function (err) {
    document.getElementById("print-chart").replaceWith(S.el("p", { class: "report-note", text: "The stage chart is not available: " + err.message }));
    done("chart");
  });

  document.getElementById("print-button").addEventListener("click", function () { window.print(); });
})();
