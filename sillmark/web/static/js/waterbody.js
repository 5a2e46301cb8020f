/* Sillmark: trace a water body on the site map and use it as an outlet.
 *
 * Clicks on the map place the corners of an area (lake, pond) or the points of a
 * line (river centreline); the shape is sent as RFC 7946 GeoJSON (WGS84) with the
 * site's other settings to the settings endpoint, which checks it against the DEM
 * and queues a new analysis. Talks only to this server. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var page = S.page(), config = page.config, map = page.map, $ = page.byId;
  var points = [];
  var sketch = null;
  S.tracing = false;

  function kind() {
    var picked = document.querySelector('input[name="draw-kind"]:checked');
    return picked ? picked.value : "Polygon";
  }

  function enough() { return points.length >= (kind() === "Polygon" ? 3 : 2); }

  function redraw() {
    if (sketch) { map.removeLayer(sketch); sketch = null; }
    var style = { color: "#0b5d8a", weight: 3, dashArray: "6 4", fillColor: "#2a8cc4", fillOpacity: 0.25,
                  className: "traced-water" };
    if (points.length >= 3 && kind() === "Polygon") { sketch = L.polygon(points, style); }
    else if (points.length >= 2) { sketch = L.polyline(points, style); }
    else if (points.length === 1) { sketch = L.circleMarker(points[0], { radius: 4, color: "#0b5d8a" }); }
    if (sketch) { sketch.addTo(map); }
    $("draw-undo").disabled = points.length === 0;
    $("draw-clear").disabled = points.length === 0;
    $("draw-submit").disabled = !enough();
    var what = kind() === "Polygon" ? "corner" : "point";
    $("draw-status").textContent = S.tracing
      ? points.length + " " + what + (points.length === 1 ? "" : "s") + " placed; click the map to add more" +
        (enough() ? ", or submit." : ".")
      : points.length ? "Tracing paused with " + points.length + " " + what + "s." :
        "Press \u201cStart tracing\u201d, then click the map at each " + what + ".";
    document.body.dataset.tracedPoints = String(points.length);
  }

  function setTracing(on) {
    S.tracing = on;
    $("draw-start").textContent = on ? "Pause tracing" : "Start tracing";
    map.getContainer().classList.toggle("tracing", on);
    if (on) { map.doubleClickZoom.disable(); } else { map.doubleClickZoom.enable(); }
    redraw();
  }

  map.on("click", function (ev) {
    if (!S.tracing) { return; }
    points.push(ev.latlng.wrap());
    redraw();
  });

  $("draw-start").addEventListener("click", function () {
    if (!S.tracing && S.outlining) {
      S.show($("draw-error"), "Finish the outline of the barrier's place first; both use clicks on the map.");
      return;
    }
    if (!S.tracing && S.drawingEdits) {
      S.show($("draw-error"), "Finish or cancel the edit being drawn (Scenarios tab) first; both use clicks on the map.");
      return;
    }
    setTracing(!S.tracing);
  });
  $("draw-undo").addEventListener("click", function () { points.pop(); redraw(); });
  $("draw-clear").addEventListener("click", function () { points = []; redraw(); });
  document.querySelectorAll('input[name="draw-kind"]').forEach(function (r) {
    r.addEventListener("change", redraw);
  });

  /* The traced shape as a GeoJSON FeatureCollection in WGS84 (lon, lat order). */
  function traced(name) {
    var coords = points.map(function (p) { return [+p.lng.toFixed(8), +p.lat.toFixed(8)]; });
    var geometry = kind() === "Polygon"
      ? { type: "Polygon", coordinates: [coords.concat([coords[0]])] }
      : { type: "LineString", coordinates: coords };
    return { type: "FeatureCollection",
             features: [{ type: "Feature", properties: { name: name, traced_on: "Sillmark site map" },
                          geometry: geometry }] };
  }

  $("draw-form").addEventListener("submit", function (ev) {
    ev.preventDefault();
    if (!enough()) {
      S.show($("draw-error"), kind() === "Polygon" ? "An area needs at least three corners." : "A line needs at least two points.");
      return;
    }
    var name = ($("draw-name").value || "traced water body").trim();
    var st = config.settings;
    var form = new FormData();
    form.append("name", st.name);
    form.append("vertical_unit", st.vertical_unit);
    form.append("vertical_datum", st.vertical_datum || "");
    st.outlets.forEach(function (k) { form.append("outlet", k); });
    form.append("outlet", "file");
    form.append("connectivity", String(st.connectivity));
    var file = name.replace(/[^\w\- ]+/g, "_").slice(0, 60) + ".geojson";
    form.append("water", new Blob([JSON.stringify(traced(name))], { type: "application/geo+json" }), file);
    S.show($("draw-error"), "");
    $("draw-submit").disabled = true;
    S.getJSON(st.url, { method: "POST", body: form }).then(function (res) {
      setTracing(false);
      $("draw-status").textContent = "Sent: the site is being analysed again with " + name + " as an outlet (run " + res.run_id + ").";
      document.body.dataset.tracedRun = String(res.run_id);
      S.followRun("A new analysis is queued with " + name + " as an outlet.");
    }).catch(function (err) {
      $("draw-submit").disabled = !enough();
      S.show($("draw-error"), err.message);
    });
  });

  redraw();
})();
