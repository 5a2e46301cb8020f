/* Sillmark: the DEM upload (with progress) and the site settings form. */
(function () {
  "use strict";
  var S = window.Sillmark;
  var $ = function (id) { return document.getElementById(id); };

  var demForm = $("dem-form");
  if (demForm) {
    var input = $("dem-file");
    var zone = demForm.querySelector(".dropzone");
    input.addEventListener("change", function () {
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
      if (!file) { S.show($("upload-error"), "Choose a DEM file first."); return; }
      S.show($("upload-error"), "");
      var bar = $("upload-bar"), text = $("upload-text");
      $("upload-progress").hidden = false;
      $("upload-button").disabled = true;
      var xhr = new XMLHttpRequest();
      xhr.open("POST", demForm.action);
      xhr.setRequestHeader("X-Sillmark-Token", S.token());
      xhr.setRequestHeader("X-File-Name", encodeURIComponent(file.name));
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
      });
      xhr.addEventListener("error", function () {
        $("upload-button").disabled = false;
        S.show($("upload-error"), "The connection to the server was lost during the upload.");
      });
      xhr.send(file);
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
