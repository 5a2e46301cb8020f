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

  /* ---- areas and volumes in the site's own units ----
   * `units` is what the server's sillmark.units.area_units gives (config.areas):
   * m², ha, m³ on metric sites; ft², acres, acre-ft on feet sites. Without it
   * the metric units are used. */
  var METRIC = {
    small_area: "m²", small_area_m2: 1, large_area: "ha", large_area_m2: 1e4, volume: "m³", volume_m3: 1,
  };

  function unitsOr(units) { return units || METRIC; }
  /* m² in the large area unit (ha or acres), as a number. */
  function inLargeArea(m2, units) { return m2 === null || m2 === undefined ? null : m2 / unitsOr(units).large_area_m2; }
  /* m³ in the volume unit (m³ or acre-ft), as a number. */
  function inVolume(m3, units) { return m3 === null || m3 === undefined ? null : m3 / unitsOr(units).volume_m3; }

  /* An area: the large unit (2 decimals), or the small unit below one large unit. */
  function area(m2, units) {
    var u = unitsOr(units);
    if (m2 === null || m2 === undefined) { return "–"; }
    if (m2 < u.large_area_m2) { return fixed(m2 / u.small_area_m2, 0) + "\u202f" + u.small_area; }
    return fixed(m2 / u.large_area_m2, 2) + "\u202f" + u.large_area;
  }

  /* An area always in the large unit (ha or acres), as the tables give it. */
  function areaLarge(m2, units) {
    return m2 === null || m2 === undefined ? "–" : fixed(inLargeArea(m2, units), 2) + "\u202f" + unitsOr(units).large_area;
  }

  function volume(m3, units) {
    var u = unitsOr(units);
    if (m3 === null || m3 === undefined) { return "–"; }
    if (u.volume_m3 !== 1) {
      var v = m3 / u.volume_m3;
      return fixed(v, Math.abs(v) < 10 ? 2 : 1) + "\u202f" + u.volume;
    }
    if (m3 >= 1e9) { return fixed(m3 / 1e9, 3) + "\u202fkm³"; }
    return fixed(m3, 0) + "\u202fm³";
  }

  /* A length on the ground: one decimal below 1000 units, none above. */
  function length(v, unit) {
    if (v === null || v === undefined || !isFinite(v)) { return "–"; }
    return fixed(v, v < 1000 ? 1 : 0) + "\u202f" + unit;
  }

  /* ---- point symbols: a shape as well as a colour for each kind of point ----
   * spill point: ochre triangle; controlling sill: crimson diamond; assets by
   * state: flooded blue disc, shielded amber square, dry green ring. */
  /* The symbols come from the server (sillmark.products.map_style, the same
   * table the SLD styles of the result files are written from), in the page's
   * configuration; a page without one draws plain dots. */
  var SYMBOLS = (function () {
    var node = document.getElementById("site-config");
    try {
      var sent = node ? JSON.parse(node.textContent).legend.symbols : null;
      if (sent && sent.point) { return sent; }
    } catch (e) { /* no configuration: plain dots below */ }
    return { point: { shape: "disc", fill: "#ffffff", stroke: "#14232c", size: 10, width: 1.6 } };
  })();

  function shapePath(shape, n) {
    var h = n / 2, m = 2;  // m: room for the outline
    if (shape === "triangle") { return '<polygon points="' + h + "," + m + " " + (n - m) + "," + (n - m) + " " + m + "," + (n - m) + '"/>'; }
    if (shape === "diamond") { return '<polygon points="' + h + "," + m + " " + (n - m) + "," + h + " " + h + "," + (n - m) + " " + m + "," + h + '"/>'; }
    if (shape === "square") { return '<rect x="' + m + '" y="' + m + '" width="' + (n - 2 * m) + '" height="' + (n - 2 * m) + '"/>'; }
    return '<circle cx="' + h + '" cy="' + h + '" r="' + (h - m) + '"/>';
  }

  /* The SVG of a point symbol (also drawn in the legend). */
  function symbol(kind) {
    var s = SYMBOLS[kind] || SYMBOLS.point;
    var width = s.width;
    return '<svg class="symbol" data-shape="' + s.shape + '" data-kind="' + kind + '" width="' + s.size +
      '" height="' + s.size + '" viewBox="0 0 ' + s.size + " " + s.size + '" fill="' + s.fill +
      '" stroke="' + s.stroke + '" stroke-width="' + width + '" aria-hidden="true">' + shapePath(s.shape, s.size) + "</svg>";
  }

  /* A Leaflet marker drawn with a point symbol. */
  function symbolMarker(latlng, kind, options) {
    var s = SYMBOLS[kind] || SYMBOLS.point;
    var icon = L.divIcon({
      html: symbol(kind), className: "symbol-marker symbol-" + kind + (options && options.className ? " " + options.className : ""),
      iconSize: [s.size, s.size], iconAnchor: [s.size / 2, s.size / 2],
    });
    return L.marker(latlng, { icon: icon, keyboard: false, riseOnHover: true, zIndexOffset: kind === "sill" ? 500 : 0 });
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

  function symbolSpan(kind) {
    var span = el("span", { class: "swatch-symbol" });
    span.innerHTML = symbol(kind);
    return span;
  }

  /* Widths at which the legend starts folded and sits below the map, not on it
   * (tablets and phones; see .legend in sillmark.css). */
  var NARROW = "(max-width: 1024px)";

  /* The legend: depth classes, shielded low ground, the ground tint and the
   * nodata gaps, then the line and point symbols. Folds on narrow screens. */
  function legend(container, spec, options) {
    options = options || {};
    container.innerHTML = "";
    var head = el("button", { type: "button", class: "legend-head", "aria-expanded": "true" },
      ["Depth of water (" + spec.unit_symbol + ")"]);
    var bodyNode = el("div", { class: "legend-body" });
    function setOpen(open) {
      bodyNode.hidden = !open;
      head.setAttribute("aria-expanded", open ? "true" : "false");
      container.classList.toggle("folded", !open);
    }
    head.addEventListener("click", function () { setOpen(bodyNode.hidden); });
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
    ];
    items.push.apply(items, groundItems(spec));
    items.push(
      el("li", {}, [el("span", { class: "swatch line-route" }), "Route from the outlets"]),
      el("li", { class: "legend-symbol", "data-kind": "sill" }, [symbolSpan("sill"), "Controlling sill (highest point of the route)"]),
      el("li", { class: "legend-symbol", "data-kind": "spill" }, [symbolSpan("spill"), "Spill point of a depression"])
    );
    if (options.assets !== false) {
      items.push(el("li", { class: "legend-symbol", "data-kind": "assets" }, [
        symbolSpan("asset-flooded"), symbolSpan("asset-shielded"), symbolSpan("asset-dry"),
        "Assets: flooded, shielded, dry"]));
    }
    bodyNode.appendChild(el("ul", { class: "legend-list" }, items));
    container.appendChild(bodyNode);
    if (!container.classList.contains("static") && window.matchMedia) {
      var narrow = window.matchMedia(NARROW);
      setOpen(!narrow.matches);
      var follow = function (ev) { setOpen(!ev.matches); };
      if (narrow.addEventListener) { narrow.addEventListener("change", follow); }
    }
    return { setOpen: setOpen };
  }

  /* Legend rows that explain the ground itself: the relief tint and the nodata gaps. */
  function groundItems(spec) {
    var out = [];
    if (spec.relief) {
      var r = spec.relief;
      var ramp = el("span", { class: "swatch ramp" });
      ramp.style.backgroundImage = "linear-gradient(90deg, " + r.stops.map(function (s) {
        return s[1] + " " + Math.round(s[0] * 100) + "%";
      }).join(", ") + ")";
      var range = (r.low !== null && r.low !== undefined && r.high !== null && r.high !== undefined)
        ? " from " + fixed(r.low, 1) + " to " + fixed(r.high, 1) + "\u202f" + spec.unit_symbol : "";
      out.push(el("li", { class: "legend-relief" }, [ramp,
        "Ground tint: the DEM's height" + range + ", green low to pale stone high, lit from the north-west by the hillshade"]));
    }
    var gap = el("span", { class: "swatch nodata" });
    if (spec.nodata_colour) { gap.style.background = spec.nodata_colour; }
    out.push(el("li", { class: "legend-nodata" }, [gap,
      "Grey gaps: no elevation in the DEM (nodata, e.g. open water); not analysed"]));
    return out;
  }

  /* What every script of the site page opens with: the page's configuration (the
   * JSON in #site-config), the Leaflet map it names, and a lookup by element id. */
  function page() {
    var config = JSON.parse(document.getElementById("site-config").textContent);
    return { config: config, map: window[config.names.map],
             byId: function (id) { return document.getElementById(id); } };
  }

  window.Sillmark = {
    page: page, token: token, getJSON: getJSON, fixed: fixed, level: level, levelAt: levelAt, area: area, volume: volume,
    symbol: symbol, symbolMarker: symbolMarker, areaLarge: areaLarge, inLargeArea: inLargeArea, inVolume: inVolume, length: length,
    el: el, show: show, legend: legend, outlets: outlets,
  };
})();
