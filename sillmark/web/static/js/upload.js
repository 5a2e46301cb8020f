/* Sillmark: the DEM upload (with progress) and the site settings form. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var $ = function (id) { return document.getElementById(id); };

  /* The CRS chooser: search the EPSG registry on the server, pick one. */
  var chooser = $("crs-chooser");
  if (chooser) {
    var search = $("crs-search"), results = $("crs-results"), code = $("crs-code"), picked = $("crs-picked");
    var timer = null, asked = 0;
    var pick = function (c) {
      code.value = c.code;
      picked.textContent = "Chosen: " + c.code + " (" + c.name + ")";
      results.hidden = true;
      search.value = "";
    };
    var list = function (found) {
      results.textContent = "";
      found.forEach(function (c) {
        var li = S.el("li", { role: "option", tabindex: "0", "class": "crs-option" }, [
          S.el("strong", { text: c.code }), " " + c.name,
          S.el("span", { "class": "muted small", text: " · " + c.kind + (c.area ? " · " + c.area : "") })]);
        li.dataset.code = c.code;
        li.addEventListener("click", function () { pick(c); });
        li.addEventListener("keydown", function (ev) { if (ev.key === "Enter") { ev.preventDefault(); pick(c); } });
        results.appendChild(li);
      });
      if (!found.length) { results.appendChild(S.el("li", { "class": "muted", text: "No CRS matches; try the EPSG code." })); }
      results.hidden = false;
    };
    search.addEventListener("input", function () {
      clearTimeout(timer);
      var q = search.value.trim();
      if (!q) { results.hidden = true; return; }
      timer = setTimeout(function () {
        var mine = ++asked;
        S.getJSON(chooser.dataset.searchUrl + "?limit=12&q=" + encodeURIComponent(q)).then(function (res) {
          if (mine === asked) { list(res.results); }
        }).catch(function (err) {
          results.textContent = "";
          results.appendChild(S.el("li", { "class": "muted", text: err.message }));
          results.hidden = false;
        });
      }, 200);
    });
  }

  var demForm = $("dem-form");
  if (demForm) {
    var input = $("dem-file");
    var zone = demForm.querySelector(".dropzone");
    input.addEventListener("change", function () {
      $("pending-token").value = "";
      $("dem-chosen").textContent = input.files[0] ? input.files[0].name + " · " +
        S.fixed(input.files[0].size / 1048576, 1) + " MiB" : "";
    });
    ["dragenter", "dragover"].forEach(function (k) {
      zone.addEventListener(k, function (ev) { ev.preventDefault(); zone.classList.add("over"); });
    });
    ["dragleave", "drop"].forEach(function (k) {
      zone.addEventListener(k, function (ev) { ev.preventDefault(); zone.classList.remove("over"); });
    });
    zone.addEventListener("drop", function (ev) {
      if (ev.dataTransfer.files.length) { input.files = ev.dataTransfer.files; input.dispatchEvent(new Event("change")); }
    });

    demForm.addEventListener("submit", function (ev) {
      ev.preventDefault();
      var file = input.files[0];
      var pending = $("pending-token").value;
      if (!file && !pending) { S.show($("upload-error"), "Choose a DEM file first."); return; }
      var query = [];
      if ($("crs-code").value) { query.push("crs=" + encodeURIComponent($("crs-code").value)); }
      if ($("band-select").value) { query.push("band=" + encodeURIComponent($("band-select").value)); }
      if (pending) { query.push("pending=" + encodeURIComponent(pending)); }
      var target = demForm.action + (query.length ? "?" + query.join("&") : "");
      S.show($("upload-error"), "");
      var bar = $("upload-bar"), text = $("upload-text");
      $("upload-progress").hidden = false;
      $("upload-button").disabled = true;
      var xhr = new XMLHttpRequest();
      xhr.open("POST", target);
      xhr.setRequestHeader("X-Sillmark-Token", S.token());
      if (!pending) { xhr.setRequestHeader("X-File-Name", encodeURIComponent(file.name)); }
      xhr.setRequestHeader("Content-Type", "application/octet-stream");
      xhr.setRequestHeader("Accept", "application/json");
      xhr.upload.addEventListener("progress", function (e) {
        if (!e.lengthComputable) { return; }
        var p = Math.round(100 * e.loaded / e.total);
        bar.style.width = p + "%";
        text.textContent = p < 100 ? "Uploading: " + p + " %" : "Uploaded; reading the DEM…";
      });
      xhr.addEventListener("load", function () {
        var body = null;
        try { body = JSON.parse(xhr.responseText); } catch (e) { body = null; }
        if (xhr.status === 201 && body) { window.location.assign(body.settings_url); return; }
        $("upload-button").disabled = false;
        $("upload-progress").hidden = true;
        S.show($("upload-error"), (body && body.error) || "The upload failed (status " + xhr.status + ").");
        if (body && body.needs) {
          // The server keeps the file: choose, then press the button again.
          $("pending-token").value = body.pending || "";
          $("dem-choices").open = true;
          if (body.needs.indexOf("band") >= 0) {
            var sel = $("band-select");
            sel.textContent = "";
            body.bands.forEach(function (b) {
              sel.appendChild(S.el("option", { value: String(b.band), text: "band " + b.band + (b.name ? " — " + b.name : "") }));
            });
          }
          if (body.needs.indexOf("crs") >= 0) { $("crs-search").focus(); }
          $("upload-button").textContent = "Read it with these choices";
        }
      });
      xhr.addEventListener("error", function () {
        $("upload-button").disabled = false;
        S.show($("upload-error"), "The connection to the server was lost during the upload.");
      });
      xhr.send(pending ? null : file);
    });
  }

  var settings = $("settings-form");
  if (settings) {
    var water = $("water-file");
    water.addEventListener("change", function () { if (water.files.length) { $("outlet-file").checked = true; } });
    settings.addEventListener("submit", function (ev) {
      ev.preventDefault();
      S.show($("settings-error"), "");
      var button = settings.querySelector("button[type=submit]");
      button.disabled = true;
      var form = new FormData(settings);
      if (!water.files.length) { form.delete("water"); }
      S.getJSON(settings.action, { method: "POST", body: form }).then(function (res) {
        window.location.assign(res.site_url);
      }).catch(function (err) {
        button.disabled = false;
        S.show($("settings-error"), err.message);
      });
    });
  }
})();
