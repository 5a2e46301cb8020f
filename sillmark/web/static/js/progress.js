/* Sillmark: follow an analysis run until it ends (survives reloads: state is on the server). */
(function () {
  "use strict";
  var S = window.Sillmark;
  var card = document.getElementById("progress-card");
  if (!card) { return; }
  var $ = function (id) { return document.getElementById(id); };
  var delay = 700;

  function poll() {
    S.getJSON(card.dataset.statusUrl).then(function (st) {
      var r = st.run;
      var shown = card.dataset.currentRun ? parseInt(card.dataset.currentRun, 10) : null;
      if (st.current_run && st.current_run !== shown) { window.location.reload(); return; }
      if (r) {
        $("run-bar").style.width = Math.max(2, r.percent) + "%";
        $("run-phase").textContent = r.phase || r.status;
        $("run-percent").textContent = String(Math.round(r.percent));
      }
      if (r && r.status === "failed") {
        $("run-title").textContent = "The analysis failed";
        S.show($("run-error"), r.message);
        $("run-actions").hidden = false;
        return;
      }
      setTimeout(poll, delay);
    }).catch(function () { setTimeout(poll, 3000); });
  }

  $("rerun-button").addEventListener("click", function () {
    S.getJSON(card.dataset.rerunUrl, { method: "POST" }).then(function () {
      S.show($("run-error"), "");
      $("run-actions").hidden = true;
      $("run-progress").hidden = false;
      $("run-title").textContent = "Analysing the site";
      setTimeout(poll, 300);
    }).catch(function (err) { S.show($("run-error"), err.message); });
  });

  if ($("run-actions").hidden) { setTimeout(poll, 300); }
})();
