// expertloop bench drawing: the scene from its description, and the context plots, as SVG.
// Plain JavaScript, no libraries. Used by bench.js through window.expertloopDraw.
(function () {
  "use strict";

  var SVG = "http://www.w3.org/2000/svg";

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

  // Draw a step's scene description into `svg`, and list its agents as text in `list`.
  function scene(svg, list, step) {
    while (svg.lastChild) svg.removeChild(svg.lastChild);
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

  // "now", or how long before the reference time t0 a step was, e.g. "−0.3 s"
  function timeOffset(step, t0) {
    var dt = step.time_s - t0;
    return dt === 0 ? "now" : "−" + fmt(-dt) + " s";
  }

  // Small line plots of the chosen features over the steps before the state (the last step),
  // the current step marked, the viewed one dashed, the steps a span covers hatched.
  // o: {steps, view, features, plotted (feature indexes), covered (span), contextSeconds}
  function plots(box, o) {
    box.textContent = "";
    var steps = o.steps;
    var t0 = steps[steps.length - 1].time_s;
    function offset(step) { return timeOffset(step, t0); }
    // the time axis covers the steps there are (a rollout's first seconds have fewer)
    var span = t0 - steps[0].time_s > 0 ? t0 - steps[0].time_s : o.contextSeconds;
    var W = 320, H = 70, left = 46, right = 8, top = 8, bottom = 16;
    function x(t) { return left + (W - left - right) * (1 - (t0 - t) / span); }
    if (steps.length === 1) {
      var note = document.createElement("p");
      note.className = "muted";
      note.textContent = "No earlier steps in this rollout.";
      box.appendChild(note);
    }
    var covered = o.covered;
    o.plotted.forEach(function (f) {
      var feature = o.features[f];
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
      if (o.view !== steps.length - 1) {
        var xv = x(steps[o.view].time_s);
        el("line", { x1: xv, y1: top, x2: xv, y2: H - bottom, "class": "plot-view" }, svg);
        el("polygon", { points: (xv - 4) + "," + top + " " + (xv + 4) + "," + top + " " + xv + "," + (top + 6), "class": "plot-view-mark" }, svg);
      }
      var cap = document.createElement("figcaption");
      cap.textContent = feature.name + (feature.unit ? " (" + feature.unit + ")" : "") + ": " + fmt(values[o.view]) +
        (o.view === steps.length - 1 ? " now" : " at " + offset(steps[o.view]));
      fig.appendChild(cap);
      box.appendChild(fig);
    });
  }

  window.expertloopDraw = { fmt: fmt, scene: scene, plots: plots, timeOffset: timeOffset };
})();
