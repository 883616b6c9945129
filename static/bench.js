// expertloop bench: claim a state, show it, take the expert's answer, keyboard first.
// Plain JavaScript, no libraries; every request goes to this site only.
(function () {
  "use strict";

  var SVG = "http://www.w3.org/2000/svg";
  var root = document.getElementById("bench");
  var config = JSON.parse(document.getElementById("bench-config").textContent);
  var csrf = root.dataset.csrf || "";
  var api = "/api/loops/" + encodeURIComponent(config.slug) + "/queue";
  var discrete = config.action_space.kind === "discrete";
  var dims = discrete ? [] : config.action_space.dimensions;
  var nActions = discrete ? config.action_space.actions.length : dims.length;
  var form = document.getElementById("answer-form");
  var spanInput = document.getElementById("span-steps");

  var s = {
    item: null, steps: [], view: 0, choice: null, unsure: false, touched: false,
    sid: null, shownAt: 0, lastRenew: 0, busy: false, activeDim: 0, note: "",
  };

  function $(id) { return document.getElementById(id); }

  // --- requests ---------------------------------------------------------------------------

  function call(method, path, body) {
    var init = {
      method: method,
      credentials: "same-origin",
      headers: { "Accept": "application/json", "X-CSRF-Token": csrf },
    };
    if (body !== undefined) {
      init.headers["Content-Type"] = "application/json";
      init.body = JSON.stringify(body);
    }
    return fetch(path, init).then(function (res) {
      return res.json().catch(function () { return {}; }).then(function (data) {
        return { ok: res.ok, status: res.status, data: data };
      });
    });
  }

  function detail(r) {
    if (r.status === 401) return "Your sign-in has ended; reload the page to sign in again.";
    return (r.data && r.data.detail) || ("The server answered " + r.status + ".");
  }

  function newSubmissionId() {
    // one id per answer: a resend after a lost reply stores the label once
    var bytes = new Uint8Array(16);
    crypto.getRandomValues(bytes);
    return Array.prototype.map.call(bytes, function (b) {
      return (b < 16 ? "0" : "") + b.toString(16);
    }).join("");
  }

  function setStatus(text, problem) {
    var el = $("status");
    el.textContent = problem ? "Problem: " + text : text;
    el.classList.toggle("problem", !!problem);
  }

  // --- queue ------------------------------------------------------------------------------

  function claim() {
    root.dataset.phase = "loading";
    return call("POST", api + "/claim").then(function (r) {
      if (!r.ok) { setStatus(detail(r), true); return; }
      if (!r.data.item) { showEmpty(); } else { show(r.data.item); }
      refreshProgress();
    }, function () {
      setStatus("The server cannot be reached. Press R to try again.", true);
    });
  }

  function showEmpty() {
    s.item = null;
    delete root.dataset.itemId;
    root.dataset.phase = "empty";
    $("workspace").hidden = true;
    $("empty").hidden = false;
    setStatus("Nothing left for you in this queue.");
    $("look-again").focus();
  }

  function show(item) {
    s.item = item;
    s.steps = item.context.concat([item.state]);
    s.view = s.steps.length - 1;
    s.choice = null;
    s.unsure = false;
    s.touched = false;
    s.sid = newSubmissionId();
    s.shownAt = performance.now();
    s.lastRenew = Date.now();
    $("empty").hidden = true;
    $("workspace").hidden = false;
    var learner = $("learner-box");
    learner.hidden = !item.learner_shown || item.learner_action === null;
    $("learner-action").textContent = item.learner_shown ? describeAction(item.learner_action) : "";
    if (spanInput) {
      spanInput.value = "0";
      spanInput.max = String(item.span_max_steps);
      spanInput.disabled = item.span_max_steps === 0;
    }
    if (!discrete) {
      dims.forEach(function (d, i) { setDim(i, (d.low + d.high) / 2, false); });
    }
    render();
    root.dataset.itemId = String(item.item_id);
    root.dataset.phase = "ready";
    if (!$("status").classList.contains("problem")) {  // a problem stays readable until acted on
      setStatus((s.note ? s.note + " " : "") + "Now: rollout " + item.state.rollout + ", step " +
        item.state.step + ".");
    }
    s.note = "";
    var first = discrete ? form.querySelector(".action") : $("dim-0-range");
    if (first) first.focus();
  }

  function answerBody() {
    if (s.unsure) return { answer: "unsure", action: null };
    if (discrete) {
      if (s.choice === null) return "Choose an action (keys 1–" + Math.min(nActions, 9) + ") or Unsure (U) first.";
      return { answer: "action", action: s.choice };
    }
    if (!s.touched) return "Set the action with the sliders or fields first (the start is only the middle of each range).";
    var values = [];
    for (var i = 0; i < dims.length; i++) {
      var v = parseFloat($("dim-" + i + "-number").value);
      if (!isFinite(v) || v < dims[i].low || v > dims[i].high) {
        return dims[i].name + " must be a number from " + dims[i].low + " to " + dims[i].high + ".";
      }
      values.push(v);
    }
    return { answer: "action", action: values };
  }

  function submit() {
    if (s.busy || !s.item) return;
    var body = answerBody();
    if (typeof body === "string") { setStatus(body, true); return; }
    body.submission_id = s.sid;
    body.seconds_spent = Math.min((performance.now() - s.shownAt) / 1000, 86400);
    if (spanInput && !spanInput.disabled) body.span_steps = parseInt(spanInput.value || "0", 10) || 0;
    s.busy = true;
    var said = body.answer === "unsure" ? "unsure" : describeAction(body.action);
    call("POST", api + "/items/" + s.item.item_id + "/labels", body).then(function (r) {
      s.busy = false;
      if (r.ok) {
        s.note = "Saved: " + said + ".";
        setStatus(s.note + " Loading the next state…");
        return claim();
      }
      if (r.status === 409) {
        setStatus(detail(r), true);
        return claim();
      }
      setStatus(detail(r), true);  // 422: the item stays, the answer can be corrected
    }, function () {
      s.busy = false;
      setStatus("Not saved: the server cannot be reached. Press Enter to send again (it is stored once).", true);
    });
  }

  function skip() {
    if (s.busy || !s.item) return;
    s.busy = true;
    call("POST", api + "/items/" + s.item.item_id + "/skip").then(function (r) {
      s.busy = false;
      if (!r.ok && r.status !== 409 && r.status !== 404) { setStatus(detail(r), true); return; }
      s.note = "Skipped; it will not be offered to you again.";
      setStatus(s.note);
      return claim();
    }, function () { s.busy = false; setStatus("The server cannot be reached.", true); });
  }

  function noteActivity() {
    // the lease is renewed while the annotator works, at most a few times per lease
    if (!s.item || Date.now() - s.lastRenew < config.lease_seconds * 1000 / 3) return;
    s.lastRenew = Date.now();
    var id = s.item.item_id;
    call("POST", api + "/items/" + id + "/renew").then(function (r) {
      if (!r.ok && s.item && s.item.item_id === id) {
        setStatus(detail(r), true);
        claim();
      }
    }, function () {});
  }

  function refreshProgress() {
    call("GET", api + "/progress").then(function (r) {
      if (!r.ok) return;
      var p = r.data;
      $("p-today").textContent = String(p.labelled_today);
      $("p-left").textContent = p.left_for_you + (p.left_for_you === 1 ? " state" : " states");
      $("p-eta").textContent = p.expected_seconds_left === null
        ? "after two labels" : duration(p.expected_seconds_left);
    }, function () {});
  }

  function duration(seconds) {
    if (seconds < 60) return "under a minute";
    var minutes = Math.round(seconds / 60);
    if (minutes < 60) return "about " + minutes + " min";
    return "about " + Math.floor(minutes / 60) + " h " + (minutes % 60) + " min";
  }

  // --- answer controls --------------------------------------------------------------------

  function describeAction(action) {
    if (action === null || action === undefined) return "none";
    if (discrete) {
      var name = typeof action === "string" ? action : config.action_space.actions[action];
      var index = config.action_space.actions.indexOf(name);
      return (index + 1) + " " + name;
    }
    return action.map(function (v, i) {
      return dims[i].name + " " + fmt(v) + (dims[i].unit ? " " + dims[i].unit : "");
    }).join(", ");
  }

  function choose(index) {
    s.choice = index;
    s.unsure = false;
    renderChoice();
  }

  function toggleUnsure() {
    s.unsure = !s.unsure;
    if (s.unsure) s.choice = null;
    renderChoice();
  }

  function renderChoice() {
    form.querySelectorAll(".action").forEach(function (b) {
      var on = !s.unsure && Number(b.dataset.action) === s.choice;
      b.setAttribute("aria-pressed", on ? "true" : "false");
      b.querySelector(".mark").textContent = on ? " ✓ chosen" : "";
    });
    var u = $("unsure");
    u.setAttribute("aria-pressed", s.unsure ? "true" : "false");
    u.querySelector(".mark").textContent = s.unsure ? " ✓ chosen" : "";
    if ((s.unsure || s.choice !== null || s.touched) && $("status").classList.contains("problem")) {
      setStatus("");  // the problem was the missing answer; it is there now
    }
    var text;
    if (s.unsure) text = "Your answer: unsure.";
    else if (discrete) text = s.choice === null ? "No answer chosen yet." : "Your answer: " + describeAction(s.choice) + ".";
    else text = s.touched ? "Your answer: " + describeAction(currentValues()) + "." : "Move a slider or type a value.";
    $("choice").textContent = text;
  }

  function currentValues() {
    return dims.map(function (_, i) { return parseFloat($("dim-" + i + "-number").value); });
  }

  function setDim(i, value, touched) {
    var d = dims[i];
    var v = Math.min(d.high, Math.max(d.low, value));
    var step = (d.high - d.low) / 100;
    v = Math.round((v - d.low) / step) * step + d.low;  // stay on the slider's grid
    v = Number(v.toPrecision(10));
    $("dim-" + i + "-range").value = String(v);
    $("dim-" + i + "-number").value = String(v);
    $("dim-" + i + "-number").removeAttribute("aria-invalid");
    if (touched) { s.touched = true; s.unsure = false; }
    renderChoice();
  }

  function nudge(direction, times) {
    if (discrete || !s.item) return;
    var d = dims[s.activeDim];
    var value = parseFloat($("dim-" + s.activeDim + "-number").value);
    if (!isFinite(value)) value = (d.low + d.high) / 2;
    setDim(s.activeDim, value + direction * times * (d.high - d.low) / 100, true);
  }

  // --- drawing ----------------------------------------------------------------------------

  function el(name, attrs, parent) {
    var node = document.createElementNS(SVG, name);
    Object.keys(attrs || {}).forEach(function (k) { node.setAttribute(k, attrs[k]); });
    if (parent) parent.appendChild(node);
    return node;
  }

  function fmt(v) {
    if (v === null || v === undefined || !isFinite(v)) return "–";
    var a = Math.abs(v);
    if (a !== 0 && (a >= 1e5 || a < 1e-3)) return v.toExponential(2);
    return String(Number(v.toFixed(a >= 100 ? 1 : 3)));
  }

  function niceStep(span) {
    var p = Math.pow(10, Math.floor(Math.log10(span)));
    var m = span / p;
    return (m <= 1 ? 1 : m <= 2 ? 2 : m <= 5 ? 5 : 10) * p;
  }

  function agentKind(kind) {
    var k = String(kind || "").toLowerCase();
    if (/person|pedestrian|human|walker|worker/.test(k)) return "person";
    if (/robot|amr/.test(k)) return "machine";
    if (/vehicle|forklift|truck|tractor|tugger|car|cart|agv|trailer|van|bike/.test(k)) return "vehicle";
    return "other";
  }

  function glyph(kind, parent) {
    var g = el("g", {}, parent);
    if (kind === "person") {
      el("circle", { r: 0.55, "class": "g-person" }, g);
      el("line", { x1: 0, y1: 0, x2: 0, y2: -1.1, "class": "g-heading" }, g);
    } else if (kind === "vehicle") {
      el("rect", { x: -0.5, y: -0.95, width: 1, height: 1.9, "class": "g-vehicle" }, g);
      el("line", { x1: -0.5, y1: -0.95, x2: 0.5, y2: -0.95, "class": "g-front" }, g);
    } else if (kind === "machine") {
      el("polygon", { points: "0,-0.8 0.7,-0.4 0.7,0.4 0,0.8 -0.7,0.4 -0.7,-0.4", "class": "g-machine" }, g);
      el("line", { x1: 0, y1: 0, x2: 0, y2: -1.1, "class": "g-heading" }, g);
    } else {
      el("polygon", { points: "0,-0.75 0.65,0 0,0.75 -0.65,0", "class": "g-other" }, g);
      el("line", { x1: 0, y1: 0, x2: 0, y2: -1.1, "class": "g-heading" }, g);
    }
    return g;
  }

  function where(a) {
    var ahead = a.x >= 0 ? fmt(a.x) + " m ahead" : fmt(-a.x) + " m behind";
    var side = a.y >= 0 ? fmt(a.y) + " m left" : fmt(-a.y) + " m right";
    var text = ahead + ", " + side;
    if (isFinite(a.heading)) {
      var deg = Math.round(a.heading * 180 / Math.PI);
      deg = ((deg + 180) % 360 + 360) % 360 - 180;
      text += ", heading " + deg + "°";
    }
    return text;
  }

  function renderScene(step) {
    var svg = $("scene");
    while (svg.lastChild) svg.removeChild(svg.lastChild);
    var list = $("agent-list");
    list.textContent = "";
    var desc = el("desc", { id: "scene-desc" }, svg);
    var scene = step.scene;
    var agents = (scene && Array.isArray(scene.agents)) ? scene.agents.filter(function (a) {
      return a && isFinite(a.x) && isFinite(a.y);
    }) : [];
    var reach = 4;
    agents.forEach(function (a) { reach = Math.max(reach, Math.abs(a.x) + 1, Math.abs(a.y) + 1); });
    var ring = niceStep(reach / 3);
    var R = Math.ceil(reach / ring) * ring;
    var behind = Math.max(0.3 * R, agents.reduce(function (m, a) { return Math.max(m, -a.x + 1); }, 0));
    // screen: up is the robot's forward (+x), left is its left (+y)
    svg.setAttribute("viewBox", [-R, -R, 2 * R, R + behind].join(" "));
    var k = R / 10;  // glyphs and text grow with the drawing so they stay legible
    var grid = el("g", { "class": "scene-grid" }, svg);
    for (var r = ring; r <= R + 1e-9; r += ring) {
      el("circle", { cx: 0, cy: 0, r: r, "class": "g-ring" }, grid);
      var label = el("text", { x: 0.15 * k, y: -r + 0.55 * k, "font-size": 0.5 * k, "class": "ring-label" }, grid);
      label.textContent = fmt(r) + " m";
    }
    el("line", { x1: 0, y1: behind, x2: 0, y2: -R, "class": "g-axis" }, grid);
    el("line", { x1: -R, y1: 0, x2: R, y2: 0, "class": "g-axis" }, grid);
    var robot = el("g", { transform: "scale(" + 0.8 * k + ")" }, svg);
    el("polygon", { points: "0,-1 0.75,0.8 0,0.4 -0.75,0.8", "class": "g-robot" }, robot);
    agents.forEach(function (a, i) {
      var kind = agentKind(a.kind);
      var heading = isFinite(a.heading) ? a.heading : 0;
      var g = glyph(kind, svg);
      g.setAttribute("transform", "translate(" + (-a.y) + " " + (-a.x) + ") rotate(" +
        (-heading * 180 / Math.PI) + ") scale(" + 0.7 * k + ")");
      var title = el("title", {}, g);
      title.textContent = (i + 1) + ": " + (a.kind || "object") + ", " + where(a);
      var tag = el("text", { x: -a.y + 0.75 * k, y: -a.x - 0.55 * k, "font-size": 0.6 * k, "class": "agent-tag" }, svg);
      tag.textContent = String(i + 1);
      var li = document.createElement("li");
      li.textContent = (a.kind || "object") + " — " + where(a);
      list.appendChild(li);
    });
    desc.textContent = scene
      ? "Top view around the robot, forward up, " + agents.length + " agent(s): " +
        agents.map(function (a, i) { return (i + 1) + " " + (a.kind || "object") + " " + where(a); }).join("; ")
      : "No scene description for this step.";
    if (!scene) {
      var none = el("text", { x: 0, y: -R / 2, "text-anchor": "middle", "font-size": 0.8 * k, "class": "ring-label" }, svg);
      none.textContent = "no scene description";
    }
  }

  function renderFeatures(step) {
    document.querySelectorAll("#features td[data-feature]").forEach(function (td) {
      td.textContent = fmt(step.features[Number(td.dataset.feature)]);
    });
    var current = s.view === s.steps.length - 1;
    $("features-when").textContent = current ? "at this state" : "at the step viewed (" + offset(step) + ")";
  }

  function renderCamera(step) {
    var fig = $("camera");
    if (!step.image_sha256) { fig.hidden = true; return; }
    var img = $("camera-img");
    img.src = "/api/images/" + step.image_sha256;
    img.alt = "Camera image at step " + step.step + " of rollout " + step.rollout;
    $("camera-caption").textContent = "Camera, step " + step.step + (s.view === s.steps.length - 1 ? " (current)" : " (" + offset(step) + ")");
    fig.hidden = false;
  }

  function offset(step) {
    var dt = step.time_s - s.item.state.time_s;
    return dt === 0 ? "now" : "−" + fmt(-dt) + " s";
  }

  function plotted() {
    return Array.prototype.filter.call(document.querySelectorAll("input[name=plot]"), function (c) {
      return c.checked;
    }).map(function (c) { return Number(c.value); });
  }

  function spanCount() {
    if (!spanInput || spanInput.disabled) return 0;
    var n = parseInt(spanInput.value || "0", 10);
    return isFinite(n) ? Math.max(0, Math.min(n, s.item.span_max_steps)) : 0;
  }

  function renderPlots() {
    var box = $("plots");
    box.textContent = "";
    var steps = s.steps;
    var t0 = s.item.state.time_s;
    // the time axis covers the steps there are (a rollout's first seconds have fewer)
    var span = t0 - steps[0].time_s > 0 ? t0 - steps[0].time_s : config.context_seconds;
    var W = 320, H = 70, left = 46, right = 8, top = 8, bottom = 16;
    function x(t) { return left + (W - left - right) * (1 - (t0 - t) / span); }
    if (steps.length === 1) {
      var note = document.createElement("p");
      note.className = "muted";
      note.textContent = "No earlier steps in this rollout.";
      box.appendChild(note);
    }
    var covered = spanCount();
    plotted().forEach(function (f) {
      var feature = config.features[f];
      var values = steps.map(function (st) { return st.features[f]; });
      var lo = Math.min.apply(null, values), hi = Math.max.apply(null, values);
      if (hi - lo < 1e-9) { lo -= 1; hi += 1; }
      function y(v) { return top + (H - top - bottom) * (1 - (v - lo) / (hi - lo)); }
      var unit = feature.unit ? " " + feature.unit : "";
      var fig = document.createElement("figure");
      fig.className = "plot";
      var svg = el("svg", {
        viewBox: "0 0 " + W + " " + H, role: "img",
        "aria-label": feature.name + " over the last " + fmt(span) + " s: from " + fmt(Math.min.apply(null, values)) +
          " to " + fmt(Math.max.apply(null, values)) + unit + ", now " + fmt(values[values.length - 1]) + unit,
      }, fig);
      if (covered > 0) {
        var from = steps[steps.length - 1 - covered].time_s;
        var to = steps[steps.length - 2].time_s;
        var pad = (x(t0) - x(t0 - span / Math.max(steps.length, 2))) / 2;
        el("rect", { x: x(from) - pad, y: top, width: x(to) - x(from) + 2 * pad, height: H - top - bottom, "class": "span-band" }, svg);
      }
      el("line", { x1: left, y1: H - bottom, x2: W - right, y2: H - bottom, "class": "plot-axis" }, svg);
      var hiLabel = el("text", { x: left - 4, y: top + 4, "text-anchor": "end", "class": "plot-label" }, svg);
      hiLabel.textContent = fmt(hi);
      var loLabel = el("text", { x: left - 4, y: H - bottom, "text-anchor": "end", "class": "plot-label" }, svg);
      loLabel.textContent = fmt(lo);
      var tLabel = el("text", { x: left, y: H - 3, "class": "plot-label" }, svg);
      tLabel.textContent = "−" + fmt(span) + " s";
      var nowLabel = el("text", { x: W - right, y: H - 3, "text-anchor": "end", "class": "plot-label" }, svg);
      nowLabel.textContent = "now";
      el("polyline", {
        points: steps.map(function (st, i) { return x(st.time_s) + "," + y(values[i]); }).join(" "),
        "class": "plot-line",
      }, svg);
      var xn = x(t0);
      el("line", { x1: xn, y1: top, x2: xn, y2: H - bottom, "class": "plot-now" }, svg);
      el("circle", { cx: xn, cy: y(values[values.length - 1]), r: 3.2, "class": "plot-now-dot" }, svg);
      if (s.view !== steps.length - 1) {
        var xv = x(steps[s.view].time_s);
        el("line", { x1: xv, y1: top, x2: xv, y2: H - bottom, "class": "plot-view" }, svg);
        el("polygon", { points: (xv - 4) + "," + top + " " + (xv + 4) + "," + top + " " + xv + "," + (top + 6), "class": "plot-view-mark" }, svg);
      }
      var cap = document.createElement("figcaption");
      cap.textContent = feature.name + (feature.unit ? " (" + feature.unit + ")" : "") + ": " + fmt(values[s.view]) +
        (s.view === steps.length - 1 ? " now" : " at " + offset(steps[s.view]));
      fig.appendChild(cap);
      box.appendChild(fig);
    });
  }

  function renderStepper() {
    var last = s.steps.length - 1;
    var current = s.view === last;
    $("step-back").disabled = s.view === 0;
    $("step-forward").disabled = current;
    $("step-current").disabled = current;
    var step = s.steps[s.view];
    $("step-position").textContent = current
      ? "current step " + step.step + " (" + last + " earlier steps available)"
      : "viewing step " + step.step + ", " + offset(step) + " (view only)";
    var note = $("viewing-note");
    note.hidden = current;
    note.textContent = current ? "" : "Viewing an earlier step (" + offset(step) +
      "), view only: your answer is for the current step. Esc returns.";
    root.classList.toggle("viewing-past", !current);
  }

  function render() {
    var step = s.steps[s.view];
    renderScene(step);
    renderFeatures(step);
    renderCamera(step);
    renderPlots();
    renderStepper();
    renderChoice();
  }

  function stepBy(delta) {
    if (!s.item) return;
    var next = Math.max(0, Math.min(s.steps.length - 1, s.view + delta));
    if (next !== s.view) { s.view = next; render(); }
  }

  function viewCurrent() {
    if (!s.item || s.view === s.steps.length - 1) return;
    s.view = s.steps.length - 1;
    render();
  }

  // --- events -----------------------------------------------------------------------------

  form.addEventListener("submit", function (e) { e.preventDefault(); submit(); });
  form.querySelectorAll(".action").forEach(function (b) {
    b.addEventListener("click", function () { choose(Number(b.dataset.action)); });
  });
  $("unsure").addEventListener("click", toggleUnsure);
  $("skip").addEventListener("click", skip);
  $("look-again").addEventListener("click", claim);
  $("step-back").addEventListener("click", function () { stepBy(-1); });
  $("step-forward").addEventListener("click", function () { stepBy(1); });
  $("step-current").addEventListener("click", viewCurrent);
  document.querySelectorAll("input[name=plot]").forEach(function (c) {
    c.addEventListener("change", function () { if (s.item) renderPlots(); });
  });
  if (spanInput) spanInput.addEventListener("input", function () { if (s.item) renderPlots(); });
  dims.forEach(function (d, i) {
    var range = $("dim-" + i + "-range"), number = $("dim-" + i + "-number");
    range.addEventListener("input", function () { s.activeDim = i; setDim(i, parseFloat(range.value), true); });
    range.addEventListener("focus", function () { s.activeDim = i; });
    number.addEventListener("focus", function () { s.activeDim = i; });
    number.addEventListener("input", function () {
      var v = parseFloat(number.value);
      s.activeDim = i;
      if (isFinite(v) && v >= d.low && v <= d.high) {
        range.value = String(v);
        number.removeAttribute("aria-invalid");
        s.touched = true;
        s.unsure = false;
      } else {
        number.setAttribute("aria-invalid", "true");
      }
      renderChoice();
    });
  });
  ["pointerdown", "input"].forEach(function (type) { document.addEventListener(type, noteActivity, true); });

  function typingIn(target) {
    return target instanceof HTMLInputElement && (target.type === "number" || target.type === "text");
  }

  document.addEventListener("keydown", function (e) {
    if (e.ctrlKey || e.metaKey || e.altKey || e.isComposing) return;
    noteActivity();
    var t = e.target;
    if (e.key === "Escape") {
      if (typingIn(t)) t.blur();
      viewCurrent();
      return;
    }
    if (e.key === "Enter") {
      // Enter submits, except on a control outside the answer (a stepper button, a summary)
      if (t !== document.body && !form.contains(t) && t.matches("button, summary, a, input")) return;
      e.preventDefault();
      if (root.dataset.phase === "empty") { claim(); return; }
      submit();
      return;
    }
    if (typingIn(t)) return;
    var key = e.key;
    if (/^[1-9]$/.test(key)) {
      var n = Number(key) - 1;
      if (n >= nActions || !s.item) return;
      e.preventDefault();
      if (discrete) {
        choose(n);
      } else {
        s.activeDim = n;
        $("dim-" + n + "-range").focus();
      }
      return;
    }
    var handled = true;
    switch (key) {
      case "u": case "U": if (s.item) toggleUnsure(); break;
      case "s": case "S": skip(); break;
      case ",": case "<": stepBy(-1); break;
      case ".": case ">": stepBy(1); break;
      case "+": case "=": nudge(1, 1); break;
      case "-": case "_": nudge(-1, 1); break;
      case "b": case "B": if (spanInput && !spanInput.disabled) { spanInput.focus(); spanInput.select(); } break;
      case "r": case "R": if (root.dataset.phase === "empty") claim(); else handled = false; break;
      default: handled = false;
    }
    if (handled) e.preventDefault();
  });

  claim();
})();
