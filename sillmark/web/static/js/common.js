/* Sillmark: small helpers shared by the pages (no libraries). */
(function () {
  "use strict";

  function token() {
    var meta = document.querySelector('meta[name="csrf-token"]');
    return meta ? meta.getAttribute("content") : "";
  }

  /* fetch JSON; rejects with an Error whose message is the server's own words. */
  function getJSON(url, options) {
    options = options || {};
    options.headers = Object.assign({ "Accept": "application/json" }, options.headers || {});
    if (options.method && options.method !== "GET") {
      options.headers["X-Sillmark-Token"] = token();
    }
    options.credentials = "same-origin";
    return fetch(url, options).then(function (response) {
      return response.text().then(function (text) {
        var body = null;
        try { body = text ? JSON.parse(text) : null; } catch (e) { body = null; }
        if (!response.ok) {
          var err = new Error((body && body.error) || ("the server answered " + response.status));
          err.status = response.status;
          throw err;
        }
        return body;
      });
    });
  }

  var nf = {};
  function fixed(v, digits) {
    if (v === null || v === undefined || !isFinite(v)) { return "–"; }
    var key = String(digits);
    if (!nf[key]) {
      nf[key] = new Intl.NumberFormat("en-GB", { minimumFractionDigits: digits, maximumFractionDigits: digits });
    }
    return nf[key].format(v);
  }

  /* A level or elevation with its unit symbol. */
  function level(v, unit) { return fixed(v, 2) + "\u202f" + unit; }
  /* A level with its vertical datum: "47.60 m above NAVD88", or "47.60 m, datum not stated". */
  function levelAt(v, unit, datum) {
    return level(v, unit) + (datum ? " above " + datum : ", datum not stated");
  }

  /* An area: ha (2 decimals) with m² for small ones. */
  function area(m2) {
    if (m2 === null || m2 === undefined) { return "–"; }
    if (m2 < 1e4) { return fixed(m2, 0) + "\u202fm²"; }
    return fixed(m2 / 1e4, 2) + "\u202fha";
  }

  function volume(m3) {
    if (m3 === null || m3 === undefined) { return "–"; }
    if (m3 >= 1e9) { return fixed(m3 / 1e9, 3) + "\u202fkm³"; }
    return fixed(m3, 0) + "\u202fm³";
  }

  function el(tag, attrs, children) {
    var node = document.createElement(tag);
    attrs = attrs || {};
    Object.keys(attrs).forEach(function (k) {
      if (k === "text") { node.textContent = attrs[k]; }
      else if (k === "class") { node.className = attrs[k]; }
      else if (k.slice(0, 2) === "on") { node.addEventListener(k.slice(2), attrs[k]); }
      else { node.setAttribute(k, attrs[k]); }
    });
    (children || []).forEach(function (c) {
      node.appendChild(typeof c === "string" ? document.createTextNode(c) : c);
    });
    return node;
  }

  function show(node, text) {
    if (!node) { return; }
    if (text) { node.textContent = text; node.hidden = false; } else { node.textContent = ""; node.hidden = true; }
  }

  /* The outlet cells of the run, drawn into a map group (the same style everywhere). */
  function outlets(group, url) {
    if (!group) { return; }
    getJSON(url).then(function (fc) {
      L.geoJSON(fc, {
        style: { color: "#0b5d8a", weight: 1.5, fillColor: "#0b5d8a", fillOpacity: 0.35, className: "outlet-cells" },
        interactive: false,
      }).addTo(group);
      document.body.dataset.outletCells = String(fc.features.length ? fc.features[0].properties.cells : 0);
    }).catch(function () { /* the outlets layer is a help, not a must */ });
  }

  /* The legend: depth classes, shielded low ground, route, sill and asset symbols. */
  function legend(container, spec, options) {
    options = options || {};
    container.innerHTML = "";
    var head = el("button", { type: "button", class: "legend-head", "aria-expanded": "true" },
      ["Depth of water (" + spec.unit_symbol + ")"]);
    var bodyNode = el("div", { class: "legend-body" });
    head.addEventListener("click", function () {
      var open = bodyNode.hidden;
      bodyNode.hidden = !open;
      head.setAttribute("aria-expanded", open ? "true" : "false");
    });
    container.appendChild(head);
    var grid = el("ul", { class: "legend-grid" });
    spec.depth_classes.forEach(function (c) {
      var sw = el("span", { class: "swatch" });
      sw.style.background = c.colour;
      grid.appendChild(el("li", {}, [sw, c.label.replace(" " + spec.unit_symbol, "")]));
    });
    bodyNode.appendChild(grid);
    var hatch = el("span", { class: "swatch hatch" });
    hatch.style.backgroundImage = "repeating-linear-gradient(-45deg, " + spec.shielded.stripe + " 0 2px, " +
      spec.shielded.wash + "66 2px 5px)";
    var items = [
      el("li", {}, [hatch, "Shielded low ground (below the level, no surface path yet)"]),
      el("li", {}, [el("span", { class: "swatch outlet" }), "Outlets (cells where the water level is set)"]),
      el("li", {}, [el("span", { class: "swatch line-route" }), "Route from the outlets"]),
      el("li", {}, [el("span", { class: "swatch dot-sill" }), "Controlling sill"]),
      el("li", {}, [el("span", { class: "swatch dot-spill" }), "Spill point"]),
    ];
    if (options.assets !== false) {
      items.push(el("li", {}, [
        el("span", { class: "swatch dot-asset flooded" }), el("span", { class: "swatch dot-asset shielded" }),
        el("span", { class: "swatch dot-asset dry" }), "Assets: flooded, shielded, dry"]));
    }
    bodyNode.appendChild(el("ul", { class: "legend-list" }, items));
    container.appendChild(bodyNode);
  }

  window.Sillmark = {
    token: token, getJSON: getJSON, fixed: fixed, level: level, levelAt: levelAt, area: area, volume: volume,
    el: el, show: show, legend: legend, outlets: outlets,
  };
})();
