/* Sillmark: draw a scenario's edits on the site map (Scenarios tab, editors only).
 *
 * A culvert is two clicks (its first and last end), a barrier a line of clicked
 * vertices, a breach an area of clicked corners; each takes its level (invert,
 * crest, breach level) in the site's vertical unit and an optional name. The
 * drawn edits are listed and shown on the map; "Add scenario from drawn edits"
 * sends them as an RFC 7946 (lon/lat) FeatureCollection, with the properties the
 * edits reader takes (sillmark.grid.edits), to the scenarios endpoint. A refused
 * edit comes back as the server's one line and the drawing stays. While drawing,
 * Sillmark.drawingEdits is set so the map's other click handlers stand aside.
 * Talks only to this server. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var page = S.page(), config = page.config, map = page.map, $ = page.byId;
  if (!$("edit-draw") || !map) { return; }
  var unit = config.unit_symbol;
  var datum = config.datum || "";
  var base = "/api/sites/" + config.site_id;

  /* Each kind: its level field and property, how many clicks it needs, its look. */
  var KINDS = {
    culvert: { field: "edit-invert", property: "invert", word: "invert", least: 2, vertex: "end",
               style: { color: "#1d4e89", weight: 4, opacity: 0.95, dashArray: "9 5" } },
    barrier: { field: "edit-crest", property: "crest", word: "crest", least: 2, vertex: "vertex",
               style: { color: "#5a3214", weight: 7, opacity: 0.95, lineCap: "square" } },
    breach: { field: "edit-level", property: "level", word: "level", least: 3, vertex: "corner",
              style: { color: "#a3231b", weight: 2, opacity: 0.95, dashArray: "4 3", fillColor: "#e0665c",
                       fillOpacity: 0.4 } },
  };

  var drawn = [];      // finished edits: {id, kind, name, value, oneWay, points, layer}
  var points = [];     // the vertices of the edit being drawn (L.LatLng)
  var serial = 0, groundSeq = 0;
  var sketch = L.layerGroup().addTo(map);
  var shapes = L.layerGroup().addTo(map);
  var level = config.level;
  var shown = parseFloat(($("level-number") || {}).value);
  if (isFinite(shown)) { level = shown; }
  S.drawingEdits = false;

  function kind() {
    var picked = document.querySelector('input[name="edit-kind"]:checked');
    return picked ? picked.value : "culvert";
  }

  function plural(n, word) { return n + " " + (n === 1 ? word : word === "vertex" ? "vertices" : word + "s"); }

  // ------------------------------------------------------------------ level fields

  /* A level field the tool filled itself follows the current level; one the user
   * typed in keeps the user's value. */
  function prefill() {
    Object.keys(KINDS).forEach(function (k) {
      var input = $(KINDS[k].field);
      if (input.value === "" || input.dataset.auto === "1") {
        input.value = (Math.round(level * 100) / 100).toFixed(2);
        input.dataset.auto = "1";
      }
    });
  }

  Object.keys(KINDS).forEach(function (k) {
    $(KINDS[k].field).addEventListener("input", function () { delete this.dataset.auto; });
  });

  /* A culvert's invert, until the user gives one: the ground at its first end. */
  function groundAtFirstEnd(p) {
    var input = $("edit-invert");
    if (input.dataset.auto !== "1") { return; }
    var mine = ++groundSeq;
    var url = base + "/cell?lon=" + p.lng.toFixed(8) + "&lat=" + p.lat.toFixed(8) +
      "&level=" + encodeURIComponent(level.toFixed(3));
    S.getJSON(url).then(function (c) {
      if (mine !== groundSeq || input.dataset.auto !== "1" || points.length !== 1) { return; }
      input.value = c.elevation.toFixed(2);
      $("edit-status").textContent = "First end placed; the invert is set to the ground there (" +
        S.levelAt(c.elevation, unit, datum) + "): lower it if the pipe lies deeper. Click the last end.";
    }).catch(function () { /* the field keeps the current level */ });
  }

  function showKindFields() {
    var k = kind();
    document.querySelectorAll("#edit-draw [data-kind]").forEach(function (label) {
      label.hidden = label.dataset.kind !== k;
    });
  }

  // ------------------------------------------------------------------ drawing

  function status() {
    var k = kind(), spec = KINDS[k], n = points.length;
    if (!S.drawingEdits) {
      return drawn.length ? plural(drawn.length, "edit") + " drawn. Draw another, or add them as a scenario."
        : "Press \u201cStart drawing\u201d, then click the map.";
    }
    if (k === "culvert") { return n === 0 ? "Click the culvert's first end." : "Click the culvert's last end."; }
    return plural(n, spec.vertex) + " placed; click the map to add more" +
      (n >= spec.least ? ", or press \u201cFinish edit\u201d." : ".");
  }

  function drawSketch() {
    sketch.clearLayers();
    var k = kind(), spec = KINDS[k];
    var style = { color: spec.style.color, weight: 2, dashArray: "3 4", fillColor: spec.style.fillColor || spec.style.color,
                  fillOpacity: 0.15, interactive: false, className: "edit-sketch" };
    if (k === "breach" && points.length >= 3) { L.polygon(points, style).addTo(sketch); }
    else if (points.length >= 2) { L.polyline(points, style).addTo(sketch); }
    points.forEach(function (p, i) {
      L.circleMarker(p, { radius: 4, color: spec.style.color, weight: 2, fillColor: i === 0 ? spec.style.color : "#ffffff",
                          fillOpacity: 1, interactive: false }).addTo(sketch);
    });
    $("edit-undo").disabled = !S.drawingEdits || points.length === 0;
    $("edit-finish").disabled = !S.drawingEdits || points.length < spec.least;
    $("edit-status").textContent = status();
    document.body.dataset.editVertices = String(points.length);
  }

  function setDrawing(on) {
    S.drawingEdits = on;
    points = [];
    groundSeq++;
    $("edit-start").textContent = on ? "Cancel edit" : "Start drawing";
    document.querySelectorAll('input[name="edit-kind"]').forEach(function (r) { r.disabled = on; });
    map.getContainer().classList.toggle("drawing-edits", on);
    if (on) { map.doubleClickZoom.disable(); } else { map.doubleClickZoom.enable(); }
    drawSketch();
  }

  $("edit-start").addEventListener("click", function () {
    S.show($("edit-error"), "");
    if (S.drawingEdits) { setDrawing(false); $("edit-status").textContent = "Edit cancelled."; return; }
    if (S.tracing) {
      S.show($("edit-error"), "Pause the water-body tracing (Outlets tab) first; both use clicks on the map.");
      return;
    }
    if (S.outlining) {
      S.show($("edit-error"), "Finish the outline of the barrier's place (Assets tab) first; both use clicks on the map.");
      return;
    }
    prefill();
    map.closePopup();
    setDrawing(true);
  });

  $("edit-undo").addEventListener("click", function () {
    points.pop();
    groundSeq++;
    drawSketch();
  });

  $("edit-finish").addEventListener("click", function () { finish(); });

  document.addEventListener("keydown", function (ev) {
    if (ev.key !== "Escape" || !S.drawingEdits) { return; }
    setDrawing(false);
    $("edit-status").textContent = "Edit cancelled.";
  });

  map.on("click", function (ev) {
    if (!S.drawingEdits) { return; }
    points.push(ev.latlng.wrap());
    if (kind() === "culvert") {
      if (points.length === 1) { groundAtFirstEnd(points[0]); }
      if (points.length === 2) { drawSketch(); finish(); return; }
    }
    drawSketch();
  });

  document.querySelectorAll('input[name="edit-kind"]').forEach(function (r) {
    r.addEventListener("change", function () { showKindFields(); drawSketch(); });
  });

  // ------------------------------------------------------------------ finished edits

  function describe(e) {
    var what = e.kind === "culvert" && e.oneWay ? "flap valve" : e.kind;
    var text = what + (e.name ? " \u201c" + e.name + "\u201d" : "") + ": " + KINDS[e.kind].word + " " +
      S.levelAt(e.value, unit, datum);
    if (e.kind === "culvert") {
      return text + (e.oneWay ? ", passing water from the first end to the last only" : ", both ways");
    }
    return text + ", " + plural(e.points.length, KINDS[e.kind].vertex);
  }

  function shapeOf(e) {
    var spec = KINDS[e.kind];
    var style = Object.assign({}, spec.style, { className: "drawn-edit drawn-" + e.kind });
    var group = L.featureGroup();
    if (e.kind === "breach") { L.polygon(e.points, style).addTo(group); }
    else {
      if (e.kind === "culvert" && e.oneWay) { style.dashArray = "2 6"; }
      L.polyline(e.points, style).addTo(group);
    }
    if (e.kind === "culvert") {
      // First end filled, last end hollow: the direction a flap valve lets water pass.
      L.circleMarker(e.points[0], { radius: 5, color: spec.style.color, weight: 2, fillColor: spec.style.color,
                                    fillOpacity: 1 }).addTo(group);
      L.circleMarker(e.points[e.points.length - 1], { radius: 5, color: spec.style.color, weight: 2,
                                                      fillColor: "#ffffff", fillOpacity: 1 }).addTo(group);
    }
    group.bindTooltip(describe(e), { sticky: true });
    return group;
  }

  function finish() {
    var k = kind(), spec = KINDS[k];
    S.show($("edit-error"), "");
    if (points.length < spec.least) {
      S.show($("edit-error"), "A " + k + " needs at least " + plural(spec.least, spec.vertex) + "; keep clicking the map.");
      return;
    }
    var input = $(spec.field), text = input.value.trim(), value = Number(text);
    if (text === "" || !isFinite(value)) {
      S.show($("edit-error"), "Give the " + k + "'s " + spec.word + " as a number in " + unit +
        ", then press \u201cFinish edit\u201d.");
      drawSketch();
      return;
    }
    var e = { id: ++serial, kind: k, name: $("edit-name").value.trim(), value: value,
              oneWay: k === "culvert" && $("edit-one-way").checked, points: points.slice() };
    e.layer = shapeOf(e);
    shapes.addLayer(e.layer);
    drawn.push(e);
    $("edit-name").value = "";
    setDrawing(false);
    renderList();
  }

  function renderList() {
    var list = $("edit-list");
    list.innerHTML = "";
    drawn.forEach(function (e, i) {
      var remove = S.el("button", { class: "button", type: "button", text: "Remove",
                                    "aria-label": "Remove edit " + (i + 1) + ", " + describe(e) });
      remove.addEventListener("click", function () {
        shapes.removeLayer(e.layer);
        drawn = drawn.filter(function (x) { return x.id !== e.id; });
        renderList();
      });
      list.appendChild(S.el("li", { "data-kind": e.kind }, [
        S.el("span", {}, [S.el("span", { class: "edit-swatch", style: "border-color:" + KINDS[e.kind].style.color }),
                          describe(e)]),
        remove,
      ]));
    });
    $("edit-scenario-submit").disabled = drawn.length === 0;
    $("edit-status").textContent = status();
    document.body.dataset.drawnEdits = String(drawn.length);
  }

  /* The drawn edits as an RFC 7946 FeatureCollection (lon, lat), as an edits file holds them. */
  function collection() {
    return {
      type: "FeatureCollection",
      features: drawn.map(function (e) {
        var coords = e.points.map(function (p) { return [+p.lng.toFixed(8), +p.lat.toFixed(8)]; });
        var props = { kind: e.kind };
        if (e.name) { props.name = e.name; }
        props[KINDS[e.kind].property] = e.value;
        if (e.kind === "culvert") { props.one_way = e.oneWay; }
        return { type: "Feature", properties: props,
                 geometry: e.kind === "breach" ? { type: "Polygon", coordinates: [coords.concat([coords[0]])] }
                   : { type: "LineString", coordinates: coords } };
      }),
    };
  }

  $("edit-scenario-form").addEventListener("submit", function (ev) {
    ev.preventDefault();
    S.show($("edit-error"), "");
    var name = $("edit-scenario-name").value.trim();
    if (!drawn.length) { S.show($("edit-error"), "Draw at least one edit first."); return; }
    if (S.drawingEdits && points.length) {
      S.show($("edit-error"), "Finish the edit being drawn, or press Escape to drop it, first.");
      return;
    }
    if (!name) { S.show($("edit-error"), "Give the scenario a name."); return; }
    $("edit-scenario-submit").disabled = true;
    S.getJSON(base + "/scenarios", {
      method: "POST", headers: { "Content-Type": "application/json" },
      body: JSON.stringify({ name: name, source: "drawn on the map", edits: collection() }),
    }).then(function () {
      if (S.drawingEdits) { setDrawing(false); }
      shapes.clearLayers();
      drawn = [];
      renderList();
      $("edit-scenario-name").value = "";
      $("edit-status").textContent = "Scenario \u201c" + name + "\u201d added; it is analysed in the background (see the list below).";
      document.dispatchEvent(new CustomEvent("sillmark:scenario-added"));
    }).catch(function (err) {
      // Refused: the server's one line; every drawn edit stays as it was.
      $("edit-scenario-submit").disabled = drawn.length === 0;
      S.show($("edit-error"), err.message);
    });
  });

  document.addEventListener("sillmark:level", function (ev) {
    level = ev.detail.level;
    if (!S.drawingEdits) { prefill(); }
  });

  prefill();
  showKindFields();
  renderList();
  drawSketch();
})();
