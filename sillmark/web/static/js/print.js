/* Sillmark: the printable map (water level layer, legend, figures). */
(function () {
  "use strict";
  var S = window.Sillmark;
  var config = JSON.parse(document.getElementById("site-config").textContent);
  var map = window[config.names.map];
  var water = window[config.names.water];
  var unit = config.unit_symbol;
  var text = config.level.toFixed(2);
  var base = "/api/sites/" + config.site_id;
  L.tileLayer("/tiles/" + config.site_id + "/" + encodeURIComponent(text) + "/{z}/{x}/{y}.png?run=" + config.run_id,
    { maxZoom: 21 }).addTo(water);
  S.legend(document.getElementById("legend"), config.legend);
  S.outlets(window[config.names.outlets], base + "/outlets.geojson");
  S.getJSON(base + "/stage?level=" + encodeURIComponent(text)).then(function (f) {
    document.getElementById("pf-flooded-area").textContent = S.area(f.flooded_area_m2);
    document.getElementById("pf-flooded-volume").textContent = S.volume(f.flooded_volume_m3) +
      (f.flooded_volume_acre_ft !== undefined ? " (" + S.fixed(f.flooded_volume_acre_ft, 1) + " acre-ft)" : "");
    document.getElementById("pf-shielded-area").textContent = S.area(f.shielded_area_m2);
    document.getElementById("pf-assets").textContent = f.assets ? f.assets.flooded + " of " + f.assets.total +
      " (" + f.assets.shielded + " shielded)" : "no asset table";
  });
  S.getJSON(base + "/assets?level=" + encodeURIComponent(text)).then(function (res) {
    var fill = { flooded: "#2f6fa3", shielded: "#d98a1c", dry: "#6f8f5a" };
    res.assets.forEach(function (a) {
      if (a.lat === null) { return; }
      L.circleMarker([a.lat, a.lon], { radius: 5, color: "#fff", weight: 1.5, fillColor: fill[a.state] || "#888", fillOpacity: 1 })
        .bindTooltip(a.name, { permanent: false }).addTo(window[config.names.assets]);
    });
  });
  document.getElementById("print-button").addEventListener("click", function () { window.print(); });
})();
