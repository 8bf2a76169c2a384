/* stagefit pages: plain JavaScript, no build step. Data comes from the token-protected
   fragment and REST routes; the API token lives in sessionStorage and travels only in the
   Authorization header, never in a URL. */
"use strict";
(function () {
  var TOKEN_KEY = "stagefit-token";
  var TERMINAL = ["done", "failed", "cancelled"];

  function token() { return sessionStorage.getItem(TOKEN_KEY) || ""; }

  function api(url, options) {
    options = options || {};
    var headers = options.headers || {};
    if (token()) { headers.Authorization = "Bearer " + token(); }
    options.headers = headers;
    return fetch(url, options);
  }

  function notice(text) {
    var box = document.getElementById("notice");
    box.textContent = text;
    box.hidden = !text;
  }

  /* the problem+json body of a failed response, or a stand-in */
  function problemOf(response) {
    return response.json().catch(function () { return {}; }).then(function (body) {
      body.status = body.status || response.status;
      body.detail = body.detail || ("the server answered " + response.status);
      if (response.status === 401) {
        body.detail = "This service needs its API token: enter it in the API token field above.";
      }
      return body;
    });
  }

  function failed(problem) { notice(problem.detail); }

  /* --- fragments ------------------------------------------------------------------------ */
  function loadFragment(el) {
    return api(el.dataset.src, { headers: { Accept: "text/html" } }).then(function (response) {
      if (!response.ok) { return problemOf(response).then(failed); }
      return response.text().then(function (html) {
        el.innerHTML = html;
        enhance(el);
      });
    }).catch(function (error) { notice("Could not reach the service: " + error.message); });
  }

  function enhance(root) {
    root.querySelectorAll("table.sortable").forEach(sortable);
    root.querySelectorAll("[data-svg]").forEach(loadSvg);
    root.querySelectorAll("[data-download]").forEach(function (b) { b.addEventListener("click", download); });
    root.querySelectorAll("[data-delete]").forEach(function (b) { b.addEventListener("click", removeSearch); });
    var svg = root.querySelector("#front");
    if (svg) { frontTips(svg, root.querySelector("#tip")); }
    var compare = root.querySelector("#compare-form");
    if (compare) { compare.addEventListener("submit", compareSelected); }
  }

  /* --- sortable tables ------------------------------------------------------------------- */
  function sortable(table) {
    table.querySelectorAll("th button[data-sort]").forEach(function (button) {
      button.setAttribute("aria-sort", "none");
      button.addEventListener("click", function () {
        var th = button.closest("th");
        var column = Array.prototype.indexOf.call(th.parentNode.children, th);
        var ascending = button.getAttribute("aria-sort") !== "ascending";
        var numeric = button.dataset.sort === "num";
        var body = table.tBodies[0];
        var rows = Array.prototype.slice.call(body.rows);
        rows.sort(function (a, b) {
          var x = a.cells[column], y = b.cells[column];
          var u = x.dataset.value !== undefined ? x.dataset.value : x.textContent.trim();
          var v = y.dataset.value !== undefined ? y.dataset.value : y.textContent.trim();
          var order;
          if (numeric) {
            var p = parseFloat(u), q = parseFloat(v);
            p = isNaN(p) ? Infinity : p; q = isNaN(q) ? Infinity : q;
            order = p === q ? 0 : (p < q ? -1 : 1);
          } else { order = u.localeCompare(v); }
          return ascending ? order : -order;
        });
        rows.forEach(function (row) { body.appendChild(row); });
        table.querySelectorAll("th button[data-sort]").forEach(function (b) { b.setAttribute("aria-sort", "none"); });
        button.setAttribute("aria-sort", ascending ? "ascending" : "descending");
        th.setAttribute("aria-sort", ascending ? "ascending" : "descending");
      });
    });
  }

  /* --- plots and downloads (fetched with the token, shown from blob URLs) --------------- */
  function loadSvg(el) {
    api(el.dataset.svg, { headers: { Accept: "image/svg+xml" } }).then(function (response) {
      if (!response.ok) { return problemOf(response).then(function (p) { el.textContent = p.detail; }); }
      return response.blob().then(function (blob) {
        var img = document.createElement("img");
        img.alt = el.getAttribute("aria-label") || "plot";
        img.src = URL.createObjectURL(blob);
        el.appendChild(img);
      });
    });
  }

  function download(event) {
    var button = event.currentTarget;
    var url = button.dataset.download;
    if (button.dataset.units) {
      url += (url.indexOf("?") < 0 ? "?" : "&") + "units=" + encodeURIComponent(document.getElementById(button.dataset.units).value);
    }
    api(url, { headers: { Accept: button.dataset.accept } }).then(function (response) {
      if (!response.ok) { return problemOf(response).then(failed); }
      return response.blob().then(function (blob) {
        var link = document.createElement("a");
        link.href = URL.createObjectURL(blob);
        link.download = button.dataset.filename;
        document.body.appendChild(link);
        link.click();
        link.remove();
        notice("");
      });
    });
  }

  function removeSearch(event) {
    var id = event.currentTarget.dataset.delete;
    if (!window.confirm("Delete search " + id + " and all its trials?")) { return; }
    api("/v1/searches/" + encodeURIComponent(id) + "?purge=true", { method: "DELETE", headers: { Accept: "application/json" } })
      .then(function (response) {
        if (!response.ok) { return problemOf(response).then(failed); }
        document.querySelectorAll(".fragment").forEach(loadFragment);
      });
  }

  function compareSelected(event) {
    event.preventDefault();
    var form = event.currentTarget;
    var ranks = Array.prototype.map.call(form.querySelectorAll("input[name=rank]:checked"), function (i) { return i.value; });
    if (ranks.length < 2 || ranks.length > 3) {
      document.getElementById("compare-note").textContent = "Tick two or three designs.";
      return;
    }
    window.location.href = "/compare?search=" + encodeURIComponent(form.dataset.search) + "&ranks=" + ranks.join(",");
  }

  /* --- the front: a tooltip on hover and keyboard focus ---------------------------------- */
  function frontTips(svg, tip) {
    function show(event) {
      var point = event.target.closest(".pt");
      if (!point) { return; }
      tip.textContent = point.querySelector("title").textContent;
      tip.hidden = false;
      var box = svg.getBoundingClientRect(), mark = point.getBoundingClientRect();
      var frame = svg.parentNode.getBoundingClientRect();
      tip.style.left = Math.min(mark.right - frame.left + 8, box.width - 200) + "px";
      tip.style.top = (mark.top - frame.top - 8) + "px";
    }
    function hide() { tip.hidden = true; }
    svg.addEventListener("mouseover", show);
    svg.addEventListener("focusin", show);
    svg.addEventListener("mouseout", hide);
    svg.addEventListener("focusout", hide);
  }

  /* --- search page: progress by polling --------------------------------------------------- */
  function units(metricValue, scale, unit) {
    return typeof metricValue === "number" ? (metricValue * scale).toPrecision(4) + " " + unit : "—";
  }

  function poll(section) {
    var results = document.getElementById("results");
    var cancel = document.getElementById("cancel");
    cancel.addEventListener("click", function () {
      api(section.dataset.status, { method: "DELETE", headers: { Accept: "application/json" } }).then(function (response) {
        if (!response.ok) { return problemOf(response).then(failed); }
      });
    });
    function tick() {
      api(section.dataset.status, { headers: { Accept: "application/json" } }).then(function (response) {
        if (!response.ok) { return problemOf(response).then(failed); }
        return response.json().then(function (s) {
          var bar = document.getElementById("progress-bar");
          bar.max = s.budget; bar.value = s.trials_done;
          document.getElementById("trials").textContent = s.trials_done + " of " + s.budget + (s.trials_running ? " (" + s.trials_running + " running)" : "");
          document.getElementById("status").textContent = s.status;
          document.getElementById("feasible").textContent = s.trials_feasible === undefined ? "—" : String(s.trials_feasible);
          document.getElementById("elapsed").textContent = (s.elapsed || 0).toFixed(1) + " s";
          var best = s.best;
          document.getElementById("best").textContent = best ? best.topology + ", " + (best.feasible ? "meets the spec" : "misses the spec") +
            ", supply current " + units(best.metrics.supply_current, 1e3, "mA") + ", swing " + units(best.metrics.swing_vpp, 1, "Vpp") : "—";
          if (TERMINAL.indexOf(s.status) >= 0) {
            cancel.disabled = true;
            loadFragment(results);
          } else { window.setTimeout(tick, 700); }
        });
      }).catch(function (error) { notice("Could not reach the service: " + error.message); });
    }
    tick();
  }

  /* --- spec page --------------------------------------------------------------------------- */
  var example = null;  /* the picked example as written (a mapping) */

  function getPath(object, path) {
    return path.split(/\.|\[|\]/).filter(Boolean).reduce(function (o, k) { return o === undefined || o === null ? undefined : o[k]; }, object);
  }

  function setPath(object, path, value) {
    var keys = path.split(/\.|\[|\]/).filter(Boolean);
    var o = object;
    keys.forEach(function (key, i) {
      if (i === keys.length - 1) { o[key] = value; return; }
      if (o[key] === undefined || o[key] === null || typeof o[key] !== "object") { o[key] = /^\d+$/.test(keys[i + 1]) ? [] : {}; }
      o = o[key];
    });
  }

  function dropPath(object, path) {
    var keys = path.split(/\.|\[|\]/).filter(Boolean);
    var parent = getPath(object, keys.slice(0, -1).join("."));
    if (parent && typeof parent === "object" && !Array.isArray(parent)) { delete parent[keys[keys.length - 1]]; }
  }

  function shown(value) {
    if (Array.isArray(value)) { return value.map(function (v) { return typeof v === "object" ? v.metric : v; }).join(", "); }
    return value === undefined || value === null ? "" : String(value);
  }

  function fillForm(form, spec) {
    form.querySelectorAll("[name]").forEach(function (input) {
      var value = getPath(spec, input.name);
      if (input.name === "gain.tolerance" && value === undefined && spec.gain && spec.gain.tolerance_db !== undefined) {
        value = spec.gain.tolerance_db + " dB";
      }
      if (input.type === "checkbox") { input.checked = value === true; } else { input.value = shown(value); }
    });
  }

  function formSpec(form) {
    var spec = JSON.parse(JSON.stringify(example || {}));
    if (spec.gain && typeof spec.gain === "object") { delete spec.gain.tolerance_db; }
    form.querySelectorAll("[name]").forEach(function (input) {
      dropPath(spec, input.name);
      var kind = input.dataset.kind, text = input.value.trim();
      if (kind === "bool") { if (input.checked || getPath(example || {}, input.name) !== undefined) { setPath(spec, input.name, input.checked); } return; }
      if (!text) { return; }
      if (kind === "list") { setPath(spec, input.name, text.split(",").map(function (s) { return s.trim(); }).filter(Boolean)); return; }
      if (kind === "int" && /^-?\d+$/.test(text)) { setPath(spec, input.name, parseInt(text, 10)); return; }
      setPath(spec, input.name, text);
    });
    if (spec.gain && typeof spec.gain === "object" && spec.gain.target !== undefined && /^-?[\d.]+(e-?\d+)?$/i.test(String(spec.gain.target))) {
      spec.gain.target = parseFloat(spec.gain.target);  /* a bare number is a signed V/V */
    }
    return spec;
  }

  function clearErrors(form) {
    form.querySelectorAll(".field-error").forEach(function (e) { e.remove(); });
    form.querySelectorAll("[aria-invalid]").forEach(function (e) { e.removeAttribute("aria-invalid"); e.removeAttribute("aria-describedby"); });
    form.querySelectorAll(".errors").forEach(function (e) { e.hidden = true; e.textContent = ""; });
  }

  function fieldFor(form, path) {
    var inputs = Array.prototype.slice.call(form.querySelectorAll("[name]"));
    var exact = inputs.filter(function (i) { return i.name === path; })[0];
    if (exact) { return exact; }
    var base = path.replace(/\[\d+\]$/, "");  /* objectives[1] -> objectives */
    return inputs.filter(function (i) { return i.name === base || i.name.indexOf(base + "[") === 0 || i.name.indexOf(base + ".") === 0; })[0];
  }

  function describe(error) {
    var value = error.value === undefined || error.value === null ? "" : " (got " + JSON.stringify(error.value) + ")";
    return error.expected + value;
  }

  function showErrors(form, box, problem) {
    var rest = [];
    (problem.errors || []).forEach(function (error, k) {
      var input = form.id === "spec-form" ? fieldFor(form, error.field) : null;
      if (!input) { rest.push(error.field + ": " + describe(error)); return; }
      var note = document.createElement("p");
      note.className = "field-error";
      note.id = "error-" + k;
      note.textContent = describe(error);
      input.setAttribute("aria-invalid", "true");
      input.setAttribute("aria-describedby", note.id);
      input.closest(".field").appendChild(note);
    });
    if (!(problem.errors || []).length) { rest.push(problem.detail); }
    if (rest.length) {
      box.hidden = false;
      var list = document.createElement("ul");
      rest.forEach(function (text) { var li = document.createElement("li"); li.textContent = text; list.appendChild(li); });
      box.appendChild(list);
    }
    var first = form.querySelector("[aria-invalid=true]");
    if (first) { first.focus(); }
  }

  function submitSpec(form, box, body, type) {
    clearErrors(form);
    notice("");
    api("/v1/searches", { method: "POST", headers: { "Content-Type": type, Accept: "application/json" }, body: body })
      .then(function (response) {
        if (response.status === 202 || response.status === 200) {
          return response.json().then(function (s) { window.location.href = "/searches/" + encodeURIComponent(s.id || s.search.id); });
        }
        return problemOf(response).then(function (problem) {
          if (response.status === 401) { failed(problem); return; }
          showErrors(form, box, problem);
        });
      }).catch(function (error) { notice("Could not reach the service: " + error.message); });
  }

  function specPage() {
    var form = document.getElementById("spec-form");
    var yamlForm = document.getElementById("yaml-form");
    document.getElementById("example-form").addEventListener("submit", function (event) {
      event.preventDefault();
      var name = document.getElementById("example").value;
      api("/ui/examples/" + encodeURIComponent(name), { headers: { Accept: "application/json" } }).then(function (response) {
        if (!response.ok) { return problemOf(response).then(failed); }
        return response.json().then(function (data) {
          example = data.spec;
          clearErrors(form); clearErrors(yamlForm);
          fillForm(form, data.spec);
          document.getElementById("yaml").value = data.yaml;
          notice("");
        });
      });
    });
    form.addEventListener("submit", function (event) {
      event.preventDefault();
      submitSpec(form, document.getElementById("spec-errors"), JSON.stringify(formSpec(form)), "application/json");
    });
    yamlForm.addEventListener("submit", function (event) {
      event.preventDefault();
      submitSpec(yamlForm, document.getElementById("yaml-errors"), document.getElementById("yaml").value, "application/yaml");
    });
  }

  /* --- start ------------------------------------------------------------------------------- */
  document.addEventListener("DOMContentLoaded", function () {
    var tokenInput = document.getElementById("token");
    tokenInput.value = token();
    document.getElementById("token-form").addEventListener("submit", function (event) {
      event.preventDefault();
      sessionStorage.setItem(TOKEN_KEY, tokenInput.value.trim());
      window.location.reload();
    });
    if (document.getElementById("spec-form")) { specPage(); }
    var progress = document.getElementById("progress");
    if (progress) { poll(progress); }
    document.querySelectorAll(".fragment:not([data-wait])").forEach(loadFragment);
  });
}());
