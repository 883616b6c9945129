// expertloop bench: claim a state, show it, take the expert's answer, keyboard first.
// Plain JavaScript, no libraries; every request goes to this site only.
(function () {
  "use strict";

  var draw = window.expertloopDraw;
  var fmt = draw.fmt;
  var root = document.getElementById("bench");
  var config = JSON.parse(document.getElementById("bench-config").textContent);
  var csrf = root.dataset.csrf || "";
  var api = "/api/loops/" + encodeURIComponent(config.slug) + "/queue";
  var discrete = config.action_space.kind === "discrete";
  var dims = discrete ? [] : config.action_space.dimensions;
  var nActions = discrete ? config.action_space.actions.length : dims.length;
  var form = document.getElementById("answer-form");
  var spanInput = document.getElementById("span-steps");
  var START_WORDS = {
    neutral: "Starts at neutral: 0 where the bounds allow, else the middle of the range. Change what differs.",
    expert: "Starts at the expert's command on the step before (step {step}). Change what differs.",
    yours: "Starts at your answer on step {step}. Change what differs.",
    learner: "Starts at the learner's action on this state. Change what differs.",
  };

  var s = {
    item: null, steps: [], view: 0, choice: null, unsure: false, touched: false,
    sid: null, shownAt: 0, lastRenew: 0, busy: false, activeDim: 0, note: "", now: "",
    start: [], startFrom: "neutral", correcting: null,
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
      if (!r.ok) {
        root.dataset.phase = "retry";  // R (or Enter) claims again
        setStatus(detail(r) + (r.status === 401 ? "" : " Press R to try again."), true);
        return;
      }
      if (!r.data.item) { showEmpty(); } else { show(r.data.item); }
      refreshProgress();
    }, function () {
      root.dataset.phase = "retry";
      setStatus("The server cannot be reached. Press R to try again.", true);
    });
  }

  // Once a state is answered or skipped nothing more is sent for it: keys pressed before the
  // next one is shown would otherwise answer it again under its submission id.
  function doneWithItem() {
    s.item = null;
  }

  function showEmpty() {
    s.item = null;
    s.correcting = null;
    delete root.dataset.itemId;
    root.dataset.phase = "empty";
    $("workspace").hidden = true;
    $("empty").hidden = false;
    setStatus((s.note ? s.note + " " : "") + "Nothing left for you in this queue.");
    s.note = "";
    $("look-again").focus();
  }

  function show(item) {
    s.item = item;
    s.correcting = null;
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
    $("correcting").hidden = true;
    $("cancel-change").hidden = true;
    $("skip").hidden = false;
    var learner = $("learner-box");
    learner.hidden = !item.learner_shown || item.learner_action === null;
    $("learner-action").textContent = item.learner_shown ? describeAction(item.learner_action) : "";
    if (spanInput) {
      spanInput.value = "0";
      spanInput.max = String(item.span_max_steps);
      spanInput.disabled = item.span_max_steps === 0;
    }
    if (!discrete) {
      setStart(item.start_action, item.start_from || "neutral", item.start_step);
    }
    render();
    root.dataset.itemId = String(item.item_id);
    root.dataset.phase = "ready";
    s.now = "Now: rollout " + item.state.rollout + ", step " + item.state.step + ".";
    if (!$("status").classList.contains("problem")) {  // a problem stays readable until acted on
      setStatus((s.note ? s.note + " " : "") + s.now);
    }
    s.note = "";
    answerMode();
  }

  function setStart(values, from, step) {
    s.start = values || dims.map(function (d) { return d.low <= 0 && 0 <= d.high ? 0 : (d.low + d.high) / 2; });
    s.startFrom = values ? from : "neutral";
    dims.forEach(function (d, i) { setDim(i, s.start[i], false); });
    s.touched = false;
    $("start-note").textContent = (START_WORDS[s.startFrom] || START_WORDS.neutral).replace("{step}", step);
  }

  // focus on the answer as a whole: digits choose (discrete) or open a dimension (continuous)
  function answerMode() {
    if (discrete) {
      var first = form.querySelector(".action");
      if (first) first.focus();
    } else {
      form.focus();
    }
  }

  function answerBody() {
    if (s.unsure) return { answer: "unsure", action: null };
    if (discrete) {
      if (s.choice === null) return "Choose an action (keys 1–" + Math.min(nActions, 9) + ") or Unsure (U) first.";
      return { answer: "action", action: s.choice };
    }
    if (!s.touched && s.startFrom === "neutral" && !s.correcting) {
      return "Set the action first: the neutral start is not an answer (type a value, or 1–" +
        Math.min(nActions, 9) + " to open a dimension).";
    }
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
    if (s.busy) return;
    if (s.correcting) { sendChange(); return; }
    if (!s.item) return;
    var body = answerBody();
    if (typeof body === "string") { setStatus(body, true); return; }
    body.submission_id = s.sid;
    body.seconds_spent = Math.min((performance.now() - s.shownAt) / 1000, 86400);
    if (spanInput && !spanInput.disabled) body.span_steps = parseInt(spanInput.value || "0", 10) || 0;
    s.busy = true;
    call("POST", api + "/items/" + s.item.item_id + "/labels", body).then(function (r) {
      s.busy = false;
      if (r.ok) {
        doneWithItem();
        // say what the store holds: a repeated submission id returns the answer stored first
        var stored = r.data.answer === "unsure" ? "unsure" : describeAction(r.data.action);
        s.note = (r.data.repeated ? "Already saved: " : "Saved: ") + stored + ".";
        setStatus(s.note + " Loading the next state…");
        recent.changed();
        return claim();
      }
      if (r.status === 409) {
        doneWithItem();
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
    if (s.busy || !s.item || s.correcting) return;
    s.busy = true;
    call("POST", api + "/items/" + s.item.item_id + "/skip").then(function (r) {
      s.busy = false;
      if (!r.ok && r.status !== 409 && r.status !== 404) { setStatus(detail(r), true); return; }
      doneWithItem();
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
      $("p-eta").textContent = expectedLeft(p);
    }, function () {});
  }

  function expectedLeft(p) {
    if (p.left_for_you === 0) return "none: nothing left for you";
    if (p.expected_seconds_left !== null) return duration(p.expected_seconds_left);
    // the pace needs two of today's labels (one timed gap)
    return p.labelled_today === 0 ? "known after your first 2 labels" : "known after your next label";
  }

  function duration(seconds) {
    if (seconds < 60) return "under a minute";
    var minutes = Math.round(seconds / 60);
    if (minutes < 60) return "about " + minutes + " min";
    return "about " + Math.floor(minutes / 60) + " h " + (minutes % 60) + " min";
  }

  // --- changing one of my recent labels -----------------------------------------------------

  function startCorrection(label) {
    s.correcting = label;
    s.steps = [label.state];
    s.view = 0;
    s.unsure = label.answer === "unsure";
    s.choice = discrete && typeof label.action === "number" ? label.action : null;
    s.sid = newSubmissionId();
    $("empty").hidden = true;
    $("workspace").hidden = false;
    $("learner-box").hidden = true;
    $("skip").hidden = true;
    $("cancel-change").hidden = false;
    var note = $("correcting");
    note.hidden = false;
    note.textContent = "Changing your answer on rollout " + label.state.rollout + ", step " + label.state.step +
      " (was: " + (label.answer === "unsure" ? "unsure" : describeAction(label.action)) + "). " +
      (label.in_snapshot ? label.in_snapshot + " holds it: the change is a correction used from the next snapshot on. "
        : "No snapshot holds it yet. ") + "Enter sends, Esc goes back.";
    if (!discrete) {
      s.start = Array.isArray(label.action) ? label.action.slice() : s.start;
      dims.forEach(function (d, i) { setDim(i, s.start[i], false); });
      $("start-note").textContent = "Starts at your earlier answer.";
    }
    root.dataset.phase = "correcting";
    render();
    answerMode();
  }

  function endCorrection() {
    s.correcting = null;
    $("correcting").hidden = true;
    if (s.item) { var item = s.item; s.item = null; show(item); } else { claim(); }
  }

  function sendChange() {
    var label = s.correcting;
    var body = answerBody();
    if (typeof body === "string") { setStatus(body, true); return; }
    body.submission_id = s.sid;
    s.busy = true;
    var said = body.answer === "unsure" ? "unsure" : describeAction(body.action);
    call("POST", api + "/my-labels/" + label.id + "/change", body).then(function (r) {
      s.busy = false;
      if (!r.ok) { setStatus(detail(r), true); if (r.status === 409 || r.status === 404) endCorrection(); return; }
      s.note = (r.data.correction ? "Corrected (from the next snapshot on): " : "Changed: ") + said + ".";
      setStatus(s.note);
      recent.changed();
      endCorrection();
    }, function () {
      s.busy = false;
      setStatus("Not saved: the server cannot be reached. Press Enter to send again (it is stored once).", true);
    });
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
      b.querySelector(".mark").textContent = on ? " ✓" : "";
    });
    var u = $("unsure");
    u.setAttribute("aria-pressed", s.unsure ? "true" : "false");
    u.querySelector(".mark").textContent = s.unsure ? " ✓" : "";
    if ((s.unsure || s.choice !== null || s.touched) && $("status").classList.contains("problem")) {
      setStatus(s.now);  // the problem was the missing answer; it is there now
    }
    var text;
    if (s.unsure) text = "Your answer: unsure.";
    else if (discrete) text = s.choice === null ? "No answer chosen yet." : "Your answer: " + describeAction(s.choice) + ".";
    else if (!s.touched && s.startFrom === "neutral" && !s.correcting) text = "Type the values that differ from the start.";
    else text = "Your answer: " + describeAction(currentValues()) + ".";
    $("choice").textContent = text;
  }

  function currentValues() {
    return dims.map(function (_, i) { return parseFloat($("dim-" + i + "-number").value); });
  }

  function markChanged(i, value) {
    var row = form.querySelector(".dimension[data-dim='" + i + "']");
    row.classList.toggle("changed", Math.abs(value - s.start[i]) > 1e-9);
  }

  function setDim(i, value, touched) {
    var d = dims[i];
    var v = Math.min(d.high, Math.max(d.low, value));
    v = Number(v.toPrecision(7));  // float32 answers come back with 7 significant digits
    $("dim-" + i + "-range").value = String(v);
    $("dim-" + i + "-number").value = String(v);
    $("dim-" + i + "-number").removeAttribute("aria-invalid");
    markChanged(i, v);
    if (touched) { s.touched = true; s.unsure = false; }
    renderChoice();
  }

  function focusDim(i) {
    if (i < 0 || i >= dims.length) { answerMode(); return; }
    s.activeDim = i;
    var field = $("dim-" + i + "-number");
    field.focus();
    field.select();  // typing replaces the value shown
  }

  function nudge(direction, times) {
    if (discrete || (!s.item && !s.correcting)) return;
    var d = dims[s.activeDim];
    var value = parseFloat($("dim-" + s.activeDim + "-number").value);
    if (!isFinite(value)) value = s.start[s.activeDim];
    var step = (d.high - d.low) / 100;
    var next = Math.round((value + direction * times * step - d.low) / step) * step + d.low;
    setDim(s.activeDim, next, true);
  }

  function renderFeatures(step) {
    document.querySelectorAll("#features [data-feature]").forEach(function (cell) {
      cell.textContent = fmt(step.features[Number(cell.dataset.feature)]);
    });
    var current = s.view === s.steps.length - 1;
    $("features-when").textContent = s.correcting ? "at the state you are changing"
      : current ? "at this state" : "at the step viewed (" + offset(step) + ")";
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

  function offset(step) { return draw.timeOffset(step, s.steps[s.steps.length - 1].time_s); }

  function checked(name) {
    return Array.prototype.filter.call(document.querySelectorAll("input[name=" + name + "]"), function (c) {
      return c.checked;
    }).map(function (c) { return Number(c.value); });
  }

  function spanCount() {
    if (!spanInput || spanInput.disabled || !s.item || s.correcting) return 0;
    var n = parseInt(spanInput.value || "0", 10);
    return isFinite(n) ? Math.max(0, Math.min(n, s.item.span_max_steps)) : 0;
  }

  function renderPlots() {
    draw.plots($("plots"), {
      steps: s.steps, view: s.view, features: config.features, plotted: checked("plot"),
      commands: {
        names: config.command_names, plotted: checked("plot-command"), discrete: discrete,
        actions: config.action_space.actions || [], dimensions: dims,
      },
      covered: spanCount(), contextSeconds: config.context_seconds,
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
      ? "step " + step.step + " (" + last + " earlier)"
      : "viewing step " + step.step + ", " + offset(step) + " (view only)";
    var note = $("viewing-note");
    note.hidden = current;
    note.textContent = current ? "" : "Viewing an earlier step (" + offset(step) +
      "), view only: your answer is for the current step. Esc returns.";
    root.classList.toggle("viewing-past", !current);
  }

  function render() {
    var step = s.steps[s.view];
    $("scene-scale").textContent = draw.scene($("scene"), $("agent-list"), step, document.querySelector(".legend"));
    renderFeatures(step);
    renderCamera(step);
    renderPlots();
    renderStepper();
    renderChoice();
  }

  function stepBy(delta) {
    if (!s.item || s.correcting) return;
    var next = Math.max(0, Math.min(s.steps.length - 1, s.view + delta));
    if (next !== s.view) { s.view = next; render(); }
  }

  function viewCurrent() {
    if (!s.item || s.view === s.steps.length - 1) return;
    s.view = s.steps.length - 1;
    render();
  }

  // --- my recent labels -------------------------------------------------------------------

  var recent = window.expertloopRecent({
    api: api, call: call, detail: detail, newId: newSubmissionId, describe: function (label) {
      return label.answer === "unsure" ? "unsure" : describeAction(label.action);
    },
    onChange: startCorrection,
    onUndone: function (text) {
      setStatus(text);
      refreshProgress();
      if (!s.item && !s.correcting) claim();
    },
    onClose: function () { if (s.correcting) return; answerMode(); },
    setStatus: setStatus,
  });

  // --- events -----------------------------------------------------------------------------

  form.setAttribute("tabindex", "-1");
  form.addEventListener("submit", function (e) { e.preventDefault(); submit(); });
  form.querySelectorAll(".action").forEach(function (b) {
    b.addEventListener("click", function () { choose(Number(b.dataset.action)); });
  });
  $("unsure").addEventListener("click", toggleUnsure);
  $("skip").addEventListener("click", skip);
  $("cancel-change").addEventListener("click", endCorrection);
  $("look-again").addEventListener("click", claim);
  $("recent-toggle").addEventListener("click", recent.toggle);
  $("empty-recent").addEventListener("click", function (e) { e.preventDefault(); recent.open(); });
  $("step-back").addEventListener("click", function () { stepBy(-1); });
  $("step-forward").addEventListener("click", function () { stepBy(1); });
  $("step-current").addEventListener("click", viewCurrent);
  document.querySelectorAll("input[name=plot], input[name=plot-command]").forEach(function (c) {
    c.addEventListener("change", function () { if (s.item || s.correcting) renderPlots(); });
  });
  if (spanInput) spanInput.addEventListener("input", function () { if (s.item) renderPlots(); });
  dims.forEach(function (d, i) {
    var range = $("dim-" + i + "-range"), number = $("dim-" + i + "-number");
    range.addEventListener("input", function () { s.activeDim = i; setDim(i, parseFloat(range.value), true); });
    number.addEventListener("focus", function () { s.activeDim = i; });
    number.addEventListener("input", function () {
      var v = parseFloat(number.value);
      s.activeDim = i;
      if (isFinite(v) && v >= d.low && v <= d.high) {
        range.value = String(v);
        number.removeAttribute("aria-invalid");
        markChanged(i, v);
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

  function dimensionField(target) {
    return target instanceof HTMLInputElement && target.classList.contains("dim-number");
  }

  document.addEventListener("keydown", function (e) {
    if (e.ctrlKey || e.metaKey || e.altKey || e.isComposing) return;
    noteActivity();
    if (recent.isOpen() && recent.handleKey(e)) return;
    var t = e.target;
    if (dimensionField(t)) {
      var i = Number(t.dataset.dim);
      if (e.key === " ") { e.preventDefault(); focusDim(i + 1 < dims.length ? i + 1 : -1); return; }
      if (e.key === "ArrowDown") { e.preventDefault(); focusDim(Math.min(i + 1, dims.length - 1)); return; }
      if (e.key === "ArrowUp") { e.preventDefault(); focusDim(Math.max(i - 1, 0)); return; }
    }
    if (e.key === "Escape") {
      if (typingIn(t)) { answerMode(); return; }  // leave the field; its value stays
      if (s.correcting) { endCorrection(); return; }
      viewCurrent();
      return;
    }
    if (e.key === "Enter") {
      // Enter submits, except on a control outside the answer (a stepper button, a summary)
      if (t !== document.body && !form.contains(t) && t.matches("button, summary, a, input")) return;
      e.preventDefault();
      if (root.dataset.phase === "empty" || root.dataset.phase === "retry") { claim(); return; }
      submit();
      return;
    }
    if (typingIn(t)) return;
    var key = e.key;
    if (/^[1-9]$/.test(key)) {
      var n = Number(key) - 1;
      if (n >= nActions || (!s.item && !s.correcting)) return;
      e.preventDefault();
      if (discrete) choose(n); else focusDim(n);
      return;
    }
    var handled = true;
    switch (key) {
      case "u": case "U": if (s.item || s.correcting) toggleUnsure(); break;
      case "s": case "S": skip(); break;
      case "l": case "L": recent.toggle(); break;
      case ",": case "<": stepBy(-1); break;
      case ".": case ">": stepBy(1); break;
      case "+": case "=": nudge(1, 1); break;
      case "-": case "_": nudge(-1, 1); break;
      case "b": case "B": if (spanInput && !spanInput.disabled) { spanInput.focus(); spanInput.select(); } break;
      case "r": case "R":
        if (root.dataset.phase === "empty" || root.dataset.phase === "retry") claim(); else handled = false;
        break;
      default: handled = false;
    }
    if (handled) e.preventDefault();
  });

  claim();
})();
