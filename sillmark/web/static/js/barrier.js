/* Sillmark: the barrier planner on the site map.
 *
 * For the asset chosen in the table (site.js calls Sillmark.onAssetChosen), the
 * last point clicked on the map, or a place outlined on the map corner by corner
 * (every cell inside must stay dry), and a target level, asks the server for the
 * shortest barrier that keeps the place dry up to that level, draws it as a line
 * labelled with its length on the ground and its cell count, says in words when no
 * barrier can do it, and offers the barrier as an edits file (GeoJSON) for
 * `sillmark analyse --edits`. Talks only to this server. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var page = S.page(), config = page.config, map = page.map, $ = page.byId;
  var unit = config.unit_symbol;
  var datum = config.datum || "";
  var base = "/api/sites/" + config.site_id;
  var layer = L.layerGroup().addTo(map);
  var place = null;   // {asset: index}, {lon:, lat:} or {polygon: GeoJSON geometry}
  var outline = L.layerGroup().addTo(map);
  var corners = [];
  S.outlining = false;
  var seq = 0;

  var levelInput = $("barrier-level");
  if (levelInput && !levelInput.value && isFinite(config.level)) {
    levelInput.value = (Math.round(config.level * 100) / 100).toFixed(2);
  }

  function choose(what, words, suggested) {
    place = what;
    if (!what.polygon) {
      corners = [];
      if (S.outlining) { setOutlining(false); } else { drawOutline(); }
    }
    $("barrier-place").textContent = words;
    $("barrier-submit").disabled = false;
    if (suggested !== null && isFinite(suggested)) { levelInput.value = suggested.toFixed(2); }
    S.show($("barrier-error"), "");
    $("barrier-result").hidden = true;
    layer.clearLayers();
    delete document.body.dataset.barrierState;
  }

  S.onAssetChosen = function (a) {
    if (a.status !== "ok") {
      place = null;
      $("barrier-submit").disabled = true;
      $("barrier-place").textContent = a.name + " has no place on the DEM (" + a.status + ").";
      return;
    }
    var step = unit === "m" ? 0.5 : 1.5;
    choose({ asset: a.index }, a.name + ": onset stage " + S.levelAt(a.onset_stage, unit, datum) + ".",
      a.onset_stage === null ? null : a.onset_stage + step);
  };

  function drawOutline() {
    outline.clearLayers();
    var style = { color: "#3b1f0e", weight: 2, dashArray: "5 4", fillColor: "#f4d35e", fillOpacity: 0.2,
                  className: "barrier-place-outline" };
    if (corners.length >= 3) { L.polygon(corners, style).addTo(outline); }
    else if (corners.length === 2) { L.polyline(corners, style).addTo(outline); }
    else if (corners.length === 1) { L.circleMarker(corners[0], { radius: 4, color: "#3b1f0e" }).addTo(outline); }
    $("barrier-outline-undo").disabled = !S.outlining || corners.length === 0;
    document.body.dataset.outlineCorners = String(corners.length);
  }

  function setOutlining(on) {
    S.outlining = on;
    $("barrier-outline").textContent = on ? "Finish outline" : "Outline a place";
    map.getContainer().classList.toggle("tracing", on);
    if (on) { map.doubleClickZoom.disable(); } else { map.doubleClickZoom.enable(); }
    drawOutline();
  }

  $("barrier-outline").addEventListener("click", function () {
    if (!S.outlining) {
      if (S.tracing) {
        S.show($("barrier-error"), "Pause the water-body tracing first; both use clicks on the map.");
        return;
      }
      if (S.drawingEdits) {
        S.show($("barrier-error"), "Finish or cancel the edit being drawn (Scenarios tab) first; both use clicks on the map.");
        return;
      }
      corners = [];
      place = null;
      $("barrier-submit").disabled = true;
      $("barrier-result").hidden = true;
      layer.clearLayers();
      S.show($("barrier-error"), "");
      $("barrier-place").textContent = "Click the map at each corner of the place, then press \u201cFinish outline\u201d.";
      setOutlining(true);
      return;
    }
    if (corners.length < 3) {
      S.show($("barrier-error"), "A place needs at least three corners; keep clicking the map.");
      return;
    }
    setOutlining(false);
    var ring = corners.map(function (p) { return [+p.lng.toFixed(8), +p.lat.toFixed(8)]; });
    choose({ polygon: { type: "Polygon", coordinates: [ring.concat([ring[0]])] } },
      "The place outlined with " + corners.length + " corners (every cell inside must stay dry).", null);
    drawOutline();
  });

  $("barrier-outline-undo").addEventListener("click", function () { corners.pop(); drawOutline(); });

  map.on("click", function (ev) {
    if (S.outlining) {
      corners.push(ev.latlng.wrap());
      drawOutline();
      return;
    }
    if (S.tracing || S.drawingEdits) { return; }
    var ll = ev.latlng.wrap();
    choose({ lon: ll.lng, lat: ll.lat },
      "The point clicked at " + S.fixed(ll.lat, 6) + "°, " + S.fixed(ll.lng, 6) + "° (WGS 84).", null);
  });

  function download(edits) {
    var blob = new Blob([JSON.stringify(edits, null, 1)], { type: "application/geo+json" });
    var a = document.createElement("a");
    a.href = URL.createObjectURL(blob);
    a.download = "planned-barrier.geojson";
    document.body.appendChild(a);
    a.click();
    setTimeout(function () { URL.revokeObjectURL(a.href); a.remove(); }, 0);
  }

  function show(b) {
    var out = $("barrier-result");
    out.innerHTML = "";
    out.hidden = false;
    layer.clearLayers();
    out.appendChild(S.el("p", { class: "whatif-numbers", text: b.message }));
    document.body.dataset.barrierState = !b.possible ? "impossible" : b.needed ? "planned" : "not-needed";
    if (!b.line) { return; }
    var label = S.length(b.length, b.length_unit) + ", " + b.cells + " cells at crest " +
      S.levelAt(b.level, unit, datum);
    var drawn = L.geoJSON(b.line, { style: { color: "#3b1f0e", weight: 6, opacity: 0.95, lineCap: "square",
      className: "barrier-line" } }).addTo(layer);
    L.geoJSON(b.line, { style: { color: "#f4d35e", weight: 2, opacity: 1, dashArray: "4 4" } }).addTo(layer);
    map.closePopup();  // an asset's popup would hide the label
    if (!map.getBounds().contains(drawn.getBounds())) { map.fitBounds(drawn.getBounds().pad(2)); }
    drawn.bindTooltip(label, { permanent: true, direction: "top", className: "barrier-label" }).openTooltip();
    document.body.dataset.barrierLength = String(b.length);
    document.body.dataset.barrierCells = String(b.cells);
    out.appendChild(S.el("p", { class: "small" }, [
      "Cells raised: " + b.cells + "; the edits file touches " + b.edit_cells +
      " cells (corner steps add the cell beside them, so water cannot slip past diagonally)."]));
    var button = S.el("button", { class: "button", type: "button", id: "barrier-export",
      text: "Download as an edits file (GeoJSON)" });
    button.addEventListener("click", function () { download(b.edits); });
    out.appendChild(button);
    if (!document.getElementById("scenario-form") || document.getElementById("scenario-form").hidden) { return; }
    // Save as a named scenario of the site: analysed in the background, then compared with it.
    var name = S.el("input", { type: "text", id: "barrier-scenario-name", maxlength: "80",
      value: "barrier at " + S.fixed(b.level, 2) + " " + unit, "aria-label": "Scenario name" });
    var save = S.el("button", { class: "button", type: "button", id: "barrier-save-scenario",
      text: "Save as scenario" });
    save.addEventListener("click", function () {
      S.show($("barrier-error"), "");
      S.getJSON(base + "/scenarios", {
        method: "POST", headers: { "Content-Type": "application/json" },
        body: JSON.stringify({ name: name.value, source: "barrier planner", edits: b.edits }),
      }).then(function () {
        document.dispatchEvent(new CustomEvent("sillmark:scenario-added"));
      }).catch(function (err) { S.show($("barrier-error"), err.message); });
    });
    out.appendChild(S.el("p", { class: "small" }, [name, " ", save]));
  }

  // The ground to plan on: the site as it is, or a scenario ready to compare (its
  // culverts, barriers and breaches in place; a saved plan keeps its edits).
  document.addEventListener("sillmark:scenarios-listed", function (ev) {
    var select = $("barrier-ground");
    if (!select) { return; }
    var keep = select.value;
    select.innerHTML = "";
    select.appendChild(S.el("option", { value: "site", text: "the site as it is" }));
    ev.detail.forEach(function (s) {
      select.appendChild(S.el("option", { value: String(s.id), text: "scenario " + s.name }));
    });
    select.value = Array.prototype.some.call(select.options, function (o) { return o.value === keep; })
      ? keep : "site";
    $("barrier-ground-label").hidden = ev.detail.length === 0;
  });

  $("barrier-form").addEventListener("submit", function (ev) {
    ev.preventDefault();
    if (!place) { return; }
    var mine = ++seq;
    S.show($("barrier-error"), "");
    var out = $("barrier-result");
    out.hidden = false;
    out.textContent = "Searching for the shortest barrier…";
    document.body.dataset.barrierState = "loading";
    var body = Object.assign({ level: levelInput.value }, place);
    if ($("barrier-ground") && $("barrier-ground").value !== "site") { body.scenario = $("barrier-ground").value; }
    S.getJSON(base + "/barrier", {
      method: "POST", headers: { "Content-Type": "application/json" }, body: JSON.stringify(body),
    }).then(function (b) {
      if (mine !== seq) { return; }
      show(b);
    }).catch(function (err) {
      if (mine !== seq) { return; }
      out.hidden = true;
      document.body.dataset.barrierState = "failed";
      S.show($("barrier-error"), err.message);
    });
  });
})();
