/* Sillmark: named scenarios of the site (the DEM with edits) and their comparison
 * with the base at the current level. Lists the scenarios with their run's progress,
 * adds one from an edits file (or from the barrier planner: event
 * "sillmark:scenario-added"), deletes one, and for the chosen scenario draws the
 * compare tiles (newly flooded, newly protected), the legend, the areas, the
 * change of onset stage of the assets and depressions, and the ZIP link. Follows
 * the level control (event "sillmark:level"). Talks only to this server. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var page = S.page(), config = page.config, map = page.map, $ = page.byId;
  var unit = config.unit_symbol;
  var base = "/api/sites/" + config.site_id + "/scenarios";
  var level = config.level, chosen = null, page = 1, layer = null, timer = null, seq = 0;
  if (!$("tab-scenarios") || !map) { return; }
  var viewer = $("scenario-form").hidden;  // the page hides what a viewer may not change
  var shown = parseFloat(($("level-number") || {}).value);
  if (isFinite(shown)) { level = shown; }

  function num(v) { return v === null || v === undefined ? "–" : v.toFixed(2); }
  function signed(v) { return v === null || v === undefined ? "–" : (v > 0 ? "+" : v < 0 ? "−" : "±") + Math.abs(v).toFixed(2); }

  function stateText(s) {
    if (s.state === "done") { return s.up_to_date ? "ready" : "made on earlier results: run it again"; }
    if (s.state === "failed") { return "failed: " + s.run.message; }
    if (s.run) { return s.run.phase + " (" + Math.round(s.run.percent) + " %)"; }
    return s.state;
  }

  function load() {
    return S.getJSON(base).then(function (res) {
      var list = $("scenario-list");
      list.innerHTML = "";
      var busy = false;
      res.scenarios.forEach(function (s) {
        if (s.state === "queued" || s.state === "running") { busy = true; }
        var item = S.el("li", { "data-scenario": String(s.id), "data-state": s.state }, [
          S.el("strong", { text: s.name }), " ",
          S.el("span", { class: "muted small", text: "(" + s.edit_count + " edit" + (s.edit_count === 1 ? "" : "s") +
            (/\.(geo)?json$/i.test(s.edits_name) ? " from " : ", ") + s.edits_name + ") · " + stateText(s) }), " ",
        ]);
        if (s.state === "done" && s.up_to_date) {
          item.appendChild(S.el("button", { class: "button", type: "button", text: "Compare",
            "data-action": "compare", onclick: function () { chosen = s; page = 1; compare(); } }));
        }
        if (s.state === "done" && !s.up_to_date && !viewer) {
          item.appendChild(S.el("button", { class: "button", type: "button", text: "Run again",
            onclick: function () { act("POST", base + "/" + s.id + "/run"); } }));
        }
        if (s.state !== "queued" && s.state !== "running" && !viewer) {
          item.appendChild(S.el("button", { class: "button", type: "button", text: "Delete",
            "aria-label": "Delete scenario " + s.name,
            onclick: function () {
              if (chosen && chosen.id === s.id) { clearCompare(); }
              act("DELETE", base + "/" + s.id);
            } }));
        }
        list.appendChild(item);
      });
      clearTimeout(timer);
      if (busy) { timer = setTimeout(load, 1000); }
      // The barrier planner offers the scenarios ready to plan on.
      document.dispatchEvent(new CustomEvent("sillmark:scenarios-listed", { detail: res.scenarios.filter(
        function (s) { return s.state === "done" && s.up_to_date; }) }));
    }).catch(function (err) { S.show($("scenario-error"), err.message); });
  }

  function act(method, url) {
    S.show($("scenario-error"), "");
    S.getJSON(url, { method: method }).then(load).catch(function (err) { S.show($("scenario-error"), err.message); });
  }

  function clearCompare() {
    chosen = null;
    $("scenario-compare").hidden = true;
    if (layer) { map.removeLayer(layer); layer = null; }
    var row = $("legend-scenario");
    if (row) { row.remove(); }
    delete document.body.dataset.scenarioCompared;
  }

  function legend(c) {
    var box = $("scenario-legend");
    box.innerHTML = "";
    var rows = c.legend.map(function (item) {
      return S.el("div", { class: "legend-row scenario-" + item.key }, [
        S.el("span", { class: "swatch", style: "background:" + item.colour + ";opacity:" + item.opacity +
          ";display:inline-block;width:14px;height:10px;margin-right:6px" }),
        S.el("span", { text: item.label }),
      ]);
    });
    rows.forEach(function (r) { box.appendChild(r); });
    var old = $("legend-scenario");
    if (old) { old.remove(); }
    var mapLegend = $("legend");
    if (mapLegend) {
      mapLegend.appendChild(S.el("div", { id: "legend-scenario" },
        [S.el("div", { class: "legend-row", text: "Scenario “" + c.scenario.name + "” against the site:" })]
          .concat(rows.map(function (r) { return r.cloneNode(true); }))
          .concat([S.el("div", { class: "legend-row small muted", text: c.caution })])));
    }
  }

  function table(id, rows, first) {
    var body = $(id).tBodies[0];
    body.innerHTML = "";
    rows.forEach(function (r) {
      body.appendChild(S.el("tr", {}, [S.el("td", { text: first(r) }), S.el("td", { text: num(r.onset_base) }),
        S.el("td", { text: num(r.onset_scenario) }), S.el("td", { text: signed(r.change) })]));
    });
  }

  function compare() {
    if (!chosen) { return; }
    var mine = ++seq, v = level;
    S.show($("scenario-error"), "");
    var url = base + "/" + chosen.id + "/compare?level=" + encodeURIComponent(v.toFixed(3)) + "&page=" + page;
    S.getJSON(url).then(function (c) {
      if (mine !== seq) { return; }
      var units = c.areas.units;
      $("scenario-compare").hidden = false;
      $("scenario-compare-title").textContent = "“" + c.scenario.name + "” against the site";
      $("scenario-level-text").textContent = "At the outlet water level " + c.level_text + ".";
      legend(c);
      var figs = $("scenario-figures");
      figs.innerHTML = "";
      [["Newly flooded", c.areas.newly_flooded_m2, "newly-flooded"],
       ["Newly protected", c.areas.newly_protected_m2, "newly-protected"]].forEach(function (f) {
        figs.appendChild(S.el("div", { class: "figure" }, [S.el("span", { class: "label", text: f[0] }),
          S.el("span", { class: "value", id: "scenario-" + f[2], text: S.area(f[1], units) })]));
      });
      table("scenario-assets", c.assets ? c.assets.rows : [], function (r) { return r.name; });
      $("scenario-assets").hidden = !c.assets;
      table("scenario-depressions", c.depressions.rows, function (r) { return String(r.id); });
      var d = c.depressions;
      $("scenario-count").textContent = d.total ? "depressions, page " + d.page + " of " + d.pages : "no depressions";
      $("scenario-prev").disabled = d.page <= 1;
      $("scenario-next").disabled = d.page >= d.pages;
      $("scenario-zip").href = c.zip_url;
      $("scenario-zip").setAttribute("download", c.zip_name);
      if (layer) { map.removeLayer(layer); }
      layer = L.tileLayer(c.tiles + "?run=" + config.run_id, { maxZoom: 21, className: "scenario-tiles" });
      layer.addTo(map);
      document.body.dataset.scenarioCompared = String(c.scenario.id);
    }).catch(function (err) {
      if (mine !== seq) { return; }
      S.show($("scenario-error"), err.message);
    });
  }

  $("scenario-prev").addEventListener("click", function () { page -= 1; compare(); });
  $("scenario-next").addEventListener("click", function () { page += 1; compare(); });

  $("scenario-form").addEventListener("submit", function (ev) {
    ev.preventDefault();
    var file = $("scenario-file").files[0];
    if (!file) { S.show($("scenario-error"), "choose an edits file (GeoJSON)"); return; }
    var body = new FormData();
    body.append("name", $("scenario-name").value);
    body.append("edits", file, file.name);
    S.show($("scenario-error"), "");
    S.getJSON(base, { method: "POST", body: body }).then(function () {
      $("scenario-form").reset();
      load();
    }).catch(function (err) { S.show($("scenario-error"), err.message); });
  });

  document.addEventListener("sillmark:level", function (ev) {
    level = ev.detail.level;
    if (chosen) { compare(); }
  });
  document.addEventListener("sillmark:scenario-added", function () {
    var tab = $("scenarios-tab");
    if (tab) { tab.click(); }
    load();
  });

  load();
})();
