/* emicase pages: draw the server-built charts, follow uploads while the worker runs,
   and a few form helpers. Plain JavaScript; every page works without it, only less live. */
(function () {
  "use strict";

  // ------------------------------------------------------------ charts
  var CONFIG = {
    responsive: true, displaylogo: false,
    modeBarButtonsToRemove: ["lasso2d", "select2d", "autoScale2d", "toggleSpikelines"],
  };

  function drawCharts(root) {
    if (typeof window.Plotly === "undefined") return;
    (root || document).querySelectorAll("[data-chart]").forEach(function (el) {
      var source = document.getElementById(el.getAttribute("data-chart"));
      if (!source) return;
      var fig = JSON.parse(source.textContent);
      el.removeAttribute("data-drawn");
      window.Plotly.newPlot(el, fig.data, fig.layout, CONFIG).then(function () {
        el.setAttribute("data-drawn", "1");
      });
    });
  }

  // ------------------------------------------------------------ live status of uploads
  function setStatus(row, item) {
    var box = row.querySelector("[data-status]");
    if (!box) return;
    var chip = box.querySelector(".chip");
    if (chip) {
      chip.className = "chip st-" + item.status;
      chip.textContent = item.label;
    }
    var bar = box.querySelector("progress");
    var note = box.querySelector("[data-note]");
    if (item.status === "running") {
      if (!bar) {
        bar = document.createElement("progress");
        bar.max = 1;
        box.appendChild(bar);
      }
      bar.value = item.progress;
      bar.textContent = Math.round(item.progress * 100) + " %";
      bar.setAttribute("aria-label", "analysis " + Math.round(item.progress * 100) + " % done");
    } else if (bar) {
      bar.remove();
    }
    if (note) {
      note.textContent = item.status === "queued" && item.queue ? "place " + item.queue + " in the queue" : "";
    }
    row.setAttribute("data-state", item.status);
  }

  function refreshSections(doc) {
    document.querySelectorAll("[data-section]").forEach(function (el) {
      var name = el.getAttribute("data-section");
      var fresh = doc.querySelector('[data-section="' + name + '"]');
      if (!fresh || fresh.innerHTML === el.innerHTML) return;
      if (el.contains(document.activeElement) && document.activeElement.tagName !== "BODY") return;
      el.innerHTML = fresh.innerHTML;
      el.querySelectorAll("[data-chart]").forEach(function (c) {
        var src = doc.getElementById(c.getAttribute("data-chart"));
        var mine = document.getElementById(c.getAttribute("data-chart"));
        if (src && mine) mine.textContent = src.textContent;
      });
      drawCharts(el);
    });
  }

  // Poll every 2 s while an upload of the case is queued or running, every 15 s otherwise
  // (another engineer may upload meanwhile); refresh the changed sections when an upload
  // finishes or the case changes.
  function followCase(el) {
    var url = el.getAttribute("data-live");
    var stamp = el.getAttribute("data-stamp");
    var states = {};
    document.querySelectorAll("[data-upload]").forEach(function (row) {
      states[row.getAttribute("data-upload")] = row.getAttribute("data-state");
    });

    function later(busy) { setTimeout(poll, busy ? 2000 : 15000); }

    function poll() {
      fetch(url, { credentials: "same-origin", headers: { Accept: "application/json" } })
        .then(function (r) { return r.ok ? r.json() : Promise.reject(r.status); })
        .then(function (data) {
          var finished = false;
          data.uploads.forEach(function (item) {
            var row = document.querySelector('[data-upload="' + item.key + '"]');
            if (row) setStatus(row, item);
            var before = states[item.key];
            if (before !== item.status && (item.status === "done" || item.status === "failed")) finished = true;
            states[item.key] = item.status;
          });
          var changed = data.stamp !== stamp;
          stamp = data.stamp;
          el.setAttribute("data-busy", data.busy ? "1" : "0");
          if (!finished && !changed) { later(data.busy); return; }
          fetch(location.href, { credentials: "same-origin" })
            .then(function (r) { return r.text(); })
            .then(function (html) { refreshSections(new DOMParser().parseFromString(html, "text/html")); })
            .then(function () { later(data.busy); }, function () { later(data.busy); });
        })
        .catch(function () { setTimeout(poll, 5000); });
    }
    later(el.getAttribute("data-busy") === "1");
  }

  function followScan(el) {
    var url = el.getAttribute("data-scan-status");
    function poll() {
      fetch(url, { credentials: "same-origin" }).then(function (r) { return r.json(); }).then(function (d) {
        var row = document.querySelector('[data-upload="' + d.key + '"]');
        if (row) setStatus(row, d);
        if (d.busy) { setTimeout(poll, 1500); return; }
        if (d.status === "done" && d.case_url && el.getAttribute("data-opening") === "1") {
          location.assign(d.case_url);
        } else {
          location.reload();
        }
      }, function () { setTimeout(poll, 4000); });
    }
    if (el.getAttribute("data-busy") === "1") setTimeout(poll, 1000);
  }

  // ------------------------------------------------------------ forms
  function scanForm(form) {
    var kinds = form.querySelectorAll('input[name$="emission_kind"]');
    if (!kinds.length) return;
    function apply() {
      var checked = form.querySelector('input[name$="emission_kind"]:checked');
      var kind = checked ? checked.value : "radiated";
      form.querySelectorAll("[data-only]").forEach(function (box) {
        box.hidden = box.getAttribute("data-only") !== kind;
      });
      form.querySelectorAll('select[name$="limit_id"] optgroup').forEach(function (g) {
        var match = g.label.toLowerCase().indexOf(kind) === 0;
        g.hidden = !match;
        g.disabled = !match;
      });
    }
    kinds.forEach(function (k) { k.addEventListener("change", apply); });
    apply();
  }

  var TRACE = /\.(csv|txt|tsv|dat|asc|prn)$/i;
  function fileChecks(form) {
    form.querySelectorAll('input[type="file"]').forEach(function (input) {
      input.addEventListener("change", function () {
        var wrap = input.closest(".field");
        var msg = wrap && wrap.querySelector("[data-client-error]");
        if (!msg) return;
        var f = input.files && input.files[0];
        if (f && !TRACE.test(f.name)) {
          msg.textContent = f.name + " is not a text trace export: choose a .csv, .txt, .tsv, .dat, .asc or .prn file.";
          msg.hidden = false;
          wrap.classList.add("has-error");
        } else {
          msg.hidden = true;
          wrap.classList.remove("has-error");
        }
      });
    });
  }

  function closeForm(form) {
    var radios = form.querySelectorAll('input[name="closure"]');
    if (!radios.length) return;
    function apply() {
      var c = form.querySelector('input[name="closure"]:checked');
      form.querySelectorAll("[data-closure]").forEach(function (box) {
        box.hidden = !!c && box.getAttribute("data-closure") !== c.value;
      });
    }
    radios.forEach(function (r) { r.addEventListener("change", apply); });
    apply();
  }

  document.addEventListener("DOMContentLoaded", function () {
    drawCharts(document);
    document.querySelectorAll("[data-live]").forEach(followCase);
    document.querySelectorAll("[data-scan-status]").forEach(followScan);
    document.querySelectorAll("form").forEach(function (f) { scanForm(f); fileChecks(f); closeForm(f); });
    document.querySelectorAll("[data-print]").forEach(function (b) {
      b.addEventListener("click", function () { window.print(); });
    });
  });
})();
