// expertloop bench drawing: the scene from its description, and the context plots, as SVG.
// Plain JavaScript, no libraries. Used by bench.js through window.expertloopDraw.
(function () {
  "use strict";

  var SVG = "http://www.w3.org/2000/svg";
  var DEFAULT_VIEW_M = 25;  // agents farther than this are marked at the edge of the view
  var GEOMETRY_STYLES = ["edge", "zone", "keepout", "surface"];
  var DEFAULT_STYLE = { line: "edge", polygon: "zone" };

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

  // An axis from the values, widened to whole steps, with labels that always differ: the
  // decimals follow the step (a flat series 1.9996…2.0004 no longer reads "2" at both ends).
  function axisRange(values) {
    var finite = values.filter(function (v) { return v !== null && isFinite(v); });
    var lo = finite.length ? Math.min.apply(null, finite) : 0;
    var hi = finite.length ? Math.max.apply(null, finite) : 1;
    var least = Math.max(Math.abs(lo), Math.abs(hi)) * 0.02 || 0.1;
    if (hi - lo < least) { var mid = (lo + hi) / 2; lo = mid - least / 2; hi = mid + least / 2; }
    var step = niceStep((hi - lo) / 2);
    lo = Math.floor(lo / step + 1e-9) * step;
    hi = Math.ceil(hi / step - 1e-9) * step;
    var decimals = Math.max(0, -Math.floor(Math.log10(step) + 1e-9));
    return { lo: lo, hi: hi, label: function (v) { return Number(v).toFixed(Math.min(decimals, 6)); } };
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

  function metres(v) {
    var a = Math.abs(v);
    if (a < 1) return fmt(Math.round(a * 1000) / 10) + " cm";
    return fmt(a) + " m";
  }

  function where(a) {
    var ahead = metres(a.x) + (a.x >= 0 ? " ahead" : " behind");
    var side = metres(a.y) + (a.y >= 0 ? " left" : " right");
    var text = ahead + ", " + side;
    if (isFinite(a.heading)) {
      var deg = Math.round(a.heading * 180 / Math.PI);
      deg = ((deg + 180) % 360 + 360) % 360 - 180;
      text += ", heading " + deg + "°";
    }
    return text;
  }

  function finitePoint(p) {
    return Array.isArray(p) && p.length === 2 && isFinite(p[0]) && isFinite(p[1]);
  }

  // screen coordinates: up is the robot's forward (+x), left is its left (+y)
  function sx(p) { return -p[1]; }
  function sy(p) { return -p[0]; }

  // The view: everything within `limit` metres fits, widened to the drawing's 4:3 shape.
  function fitView(agents, shapes, limit) {
    var xs = [0], ys = [0];
    agents.forEach(function (a) {
      if (Math.hypot(a.x, a.y) <= limit) { xs.push(-a.y); ys.push(-a.x); }
    });
    shapes.forEach(function (s) {
      s.points.forEach(function (p) {
        if (Math.hypot(p[0], p[1]) <= limit) { xs.push(sx(p)); ys.push(sy(p)); }
      });
    });
    var minX = Math.min.apply(null, xs), maxX = Math.max.apply(null, xs);
    var minY = Math.min.apply(null, ys), maxY = Math.max.apply(null, ys);
    var span = Math.max(maxX - minX, maxY - minY, 1e-3);
    var pad = 0.14 * span;  // room for glyphs, tags and the edge marks
    minX -= pad; maxX += pad; minY -= pad; maxY += pad;
    var w = maxX - minX, h = maxY - minY;
    if (w / h < 4 / 3) { var extra = (h * 4 / 3 - w) / 2; minX -= extra; w = h * 4 / 3; }
    else { var more = (w * 3 / 4 - h) / 2; minY -= more; h = w * 3 / 4; }
    return { x: minX, y: minY, w: w, h: h };
  }

  // where the ray from the robot towards (px, py) leaves the view, pulled in by `inset`
  function edgePoint(view, px, py, inset) {
    var x0 = view.x + inset, x1 = view.x + view.w - inset;
    var y0 = view.y + inset, y1 = view.y + view.h - inset;
    var t = Infinity;
    if (px > 0) t = Math.min(t, x1 / px); else if (px < 0) t = Math.min(t, x0 / px);
    if (py > 0) t = Math.min(t, y1 / py); else if (py < 0) t = Math.min(t, y0 / py);
    return [px * t, py * t];
  }

  function drawGeometry(svg, shapes, u) {
    var layer = el("g", { "class": "scene-geometry" }, svg);
    shapes.forEach(function (s) {
      var pts = s.points.map(function (p) { return sx(p) + "," + sy(p); }).join(" ");
      var shape = el(s.kind === "line" ? "polyline" : "polygon", { points: pts, "class": "geo-" + s.style }, layer);
      var title = el("title", {}, shape);
      title.textContent = (s.label || s.style) + " (" + s.kind + ")";
      if (s.label) {
        var first = s.points[0];
        var text = el("text", { x: sx(first) + 0.4 * u, y: sy(first) - 0.4 * u, "font-size": 1.1 * u, "class": "geo-label" }, layer);
        text.textContent = s.label;
      }
    });
  }

  function drawScaleBar(svg, view, u) {
    var length = niceStep(view.w / 6);
    var x = view.x + 1.2 * u, y = view.y + view.h - 1.4 * u;
    var bar = el("g", { "class": "scale-bar" }, svg);
    el("rect", { x: x - 0.4 * u, y: y - 2.2 * u, width: length + 0.8 * u + 4.5 * u, height: 2.9 * u, "class": "scale-back" }, bar);
    el("line", { x1: x, y1: y, x2: x + length, y2: y, "class": "scale-line" }, bar);
    el("line", { x1: x, y1: y - 0.5 * u, x2: x, y2: y + 0.3 * u, "class": "scale-line" }, bar);
    el("line", { x1: x + length, y1: y - 0.5 * u, x2: x + length, y2: y + 0.3 * u, "class": "scale-line" }, bar);
    var label = el("text", { x: x + length + 0.5 * u, y: y + 0.4 * u, "font-size": 1.3 * u, "class": "scale-text" }, bar);
    label.textContent = metres(length);
    return length;
  }

  // Draw a step's scene description into `svg`, list its agents as text in `list`, and show
  // the legend entries of what is drawn. Returns a short text of the scale.
  function scene(svg, list, step, legend) {
    while (svg.lastChild) svg.removeChild(svg.lastChild);
    list.textContent = "";
    var desc = el("desc", { id: "scene-desc" }, svg);
    var description = step.scene;
    var agents = (description && Array.isArray(description.agents)) ? description.agents.filter(function (a) {
      return a && isFinite(a.x) && isFinite(a.y);
    }) : [];
    var shapes = (description && Array.isArray(description.geometry)) ? description.geometry.filter(function (s) {
      return s && Array.isArray(s.points) && s.points.every(finitePoint);
    }).map(function (s) {
      var style = GEOMETRY_STYLES.indexOf(s.style) >= 0 ? s.style : DEFAULT_STYLE[s.kind] || "edge";
      return { kind: s.kind === "polygon" ? "polygon" : "line", points: s.points, style: style, label: s.label || "" };
    }) : [];
    var limit = description && isFinite(description.view_m) && description.view_m > 0 ? description.view_m : DEFAULT_VIEW_M;
    var view = fitView(agents, shapes, limit);
    svg.setAttribute("viewBox", [view.x, view.y, view.w, view.h].join(" "));
    var u = view.w / 40;  // one text unit: about 11 px on the bench's drawing
    var grid = el("g", { "class": "scene-grid" }, svg);
    var ring = niceStep(Math.max(view.w, view.h) / 5);
    var reach = Math.hypot(Math.max(Math.abs(view.x), Math.abs(view.x + view.w)), Math.max(Math.abs(view.y), Math.abs(view.y + view.h)));
    for (var r = ring; r <= reach; r += ring) {
      el("circle", { cx: 0, cy: 0, r: r, "class": "g-ring" }, grid);
    }
    el("line", { x1: 0, y1: view.y, x2: 0, y2: view.y + view.h, "class": "g-axis" }, grid);
    el("line", { x1: view.x, y1: 0, x2: view.x + view.w, y2: 0, "class": "g-axis" }, grid);
    drawGeometry(svg, shapes, u);
    var robot = el("g", { transform: "scale(" + 1.3 * u + ")" }, svg);
    el("polygon", { points: "0,-1 0.75,0.8 0,0.4 -0.75,0.8", "class": "g-robot" }, robot);
    var beyond = 0;
    agents.forEach(function (a, i) {
      var kind = agentKind(a.kind);
      var heading = isFinite(a.heading) ? a.heading : 0;
      var name = (a.kind || "object");
      var li = document.createElement("li");
      li.textContent = name + " — " + where(a);
      list.appendChild(li);
      var distance = Math.hypot(a.x, a.y);
      if (distance > limit) {
        beyond += 1;
        var at = edgePoint(view, -a.y, -a.x, 1.2 * u);
        var angle = Math.atan2(-a.y, a.x) * 180 / Math.PI;  // screen angle from "up"
        var mark = el("g", { transform: "translate(" + at[0] + " " + at[1] + ") rotate(" + angle + ") scale(" + u + ")", "class": "beyond" }, svg);
        el("polygon", { points: "0,-1.2 1,0.6 0,0.1 -1,0.6", "class": "g-beyond" }, mark);
        var t = el("title", {}, mark);
        t.textContent = (i + 1) + ": " + name + " beyond the view, " + where(a);
        var label = el("text", { x: at[0] - (at[0] > 0 ? 1.5 * u : -1.5 * u), y: at[1] + (at[1] < 0 ? 2.6 * u : -1.6 * u),
          "text-anchor": at[0] > 0 ? "end" : "start", "font-size": 1.1 * u, "class": "agent-tag" }, svg);
        label.textContent = (i + 1) + " · " + metres(distance);
        return;
      }
      var g = glyph(kind, svg);
      g.setAttribute("transform", "translate(" + (-a.y) + " " + (-a.x) + ") rotate(" +
        (-heading * 180 / Math.PI) + ") scale(" + 1.1 * u + ")");
      var title = el("title", {}, g);
      title.textContent = (i + 1) + ": " + name + ", " + where(a);
      var tag = el("text", { x: -a.y + 1.2 * u, y: -a.x - 0.8 * u, "font-size": 1.3 * u, "class": "agent-tag" }, svg);
      tag.textContent = String(i + 1);
    });
    var scale = drawScaleBar(svg, view, u);
    if (legend) {
      legend.querySelectorAll("[data-legend]").forEach(function (item) {
        var key = item.dataset.legend;
        item.hidden = key === "beyond" ? beyond === 0 : !shapes.some(function (s) { return s.style === key; });
      });
    }
    desc.textContent = description
      ? "Top view around the robot, forward up, scale bar " + metres(scale) + ", " + agents.length + " agent(s)" +
        (beyond ? " (" + beyond + " beyond the view, marked at its edge)" : "") + ": " +
        agents.map(function (a, i) { return (i + 1) + " " + (a.kind || "object") + " " + where(a); }).join("; ") +
        (shapes.length ? "; " + shapes.length + " static shape(s)" : "")
      : "No scene description for this step.";
    if (!description) {
      var none = el("text", { x: view.x + view.w / 2, y: view.y + view.h / 3, "text-anchor": "middle", "font-size": 1.6 * u, "class": "ring-label" }, svg);
      none.textContent = "no scene description";
    }
    return "scale bar " + metres(scale) + (beyond ? ", " + beyond + " beyond the view" : "");
  }

  // "now", or how long before the reference time t0 a step was, e.g. "−0.3 s"
  function timeOffset(step, t0) {
    var dt = step.time_s - t0;
    return dt === 0 ? "now" : "−" + fmt(-dt) + " s";
  }

  // One small plot of series over the steps before the state (the last step): the current step
  // marked, the viewed one dashed, the steps a span covers hatched.
  // series: [{values (one per step, null where none), cls}]; axis: {lo, hi, label}
  function plot(box, o, caption, ariaLabel, series, axis) {
    var steps = o.steps;
    var t0 = steps[steps.length - 1].time_s;
    var span = t0 - steps[0].time_s > 0 ? t0 - steps[0].time_s : o.contextSeconds;
    var W = 320, H = 56, left = 50, right = 8, top = 6, bottom = 14;
    function x(t) { return left + (W - left - right) * (1 - (t0 - t) / span); }
    function y(v) { return top + (H - top - bottom) * (1 - (v - axis.lo) / (axis.hi - axis.lo)); }
    var fig = document.createElement("figure");
    fig.className = "plot";
    var svg = el("svg", { viewBox: "0 0 " + W + " " + H, role: "img", "aria-label": ariaLabel }, fig);
    if (o.covered > 0 && steps.length > o.covered + 1) {
      var from = steps[steps.length - 1 - o.covered].time_s;
      var to = steps[steps.length - 2].time_s;
      var pad = (x(t0) - x(t0 - span / Math.max(steps.length, 2))) / 2;
      el("rect", { x: x(from) - pad, y: top, width: x(to) - x(from) + 2 * pad, height: H - top - bottom, "class": "span-band" }, svg);
    }
    el("line", { x1: left, y1: H - bottom, x2: W - right, y2: H - bottom, "class": "plot-axis" }, svg);
    var hiLabel = el("text", { x: left - 4, y: top + 6, "text-anchor": "end", "class": "plot-label" }, svg);
    hiLabel.textContent = axis.label(axis.hi);
    var loLabel = el("text", { x: left - 4, y: H - bottom, "text-anchor": "end", "class": "plot-label" }, svg);
    loLabel.textContent = axis.label(axis.lo);
    var tLabel = el("text", { x: left, y: H - 2, "class": "plot-label" }, svg);
    tLabel.textContent = "−" + fmt(span) + " s";
    var nowLabel = el("text", { x: W - right, y: H - 2, "text-anchor": "end", "class": "plot-label" }, svg);
    nowLabel.textContent = "now";
    series.forEach(function (line) {
      var runs = [], run = [];
      line.values.forEach(function (v, i) {
        if (v === null || v === undefined || !isFinite(v)) { if (run.length) runs.push(run); run = []; return; }
        run.push(x(steps[i].time_s) + "," + y(v));
      });
      if (run.length) runs.push(run);
      runs.forEach(function (points) {
        if (points.length === 1) {
          var xy = points[0].split(",");
          el("circle", { cx: xy[0], cy: xy[1], r: 2, "class": line.cls + " dot" }, svg);
        } else {
          el("polyline", { points: points.join(" "), "class": line.cls }, svg);
        }
      });
    });
    var xn = x(t0);
    el("line", { x1: xn, y1: top, x2: xn, y2: H - bottom, "class": "plot-now" }, svg);
    if (o.view !== steps.length - 1) {
      var xv = x(steps[o.view].time_s);
      el("line", { x1: xv, y1: top, x2: xv, y2: H - bottom, "class": "plot-view" }, svg);
      el("polygon", { points: (xv - 4) + "," + top + " " + (xv + 4) + "," + top + " " + xv + "," + (top + 6), "class": "plot-view-mark" }, svg);
    }
    var cap = document.createElement("figcaption");
    cap.textContent = caption;
    fig.appendChild(cap);
    box.appendChild(fig);
  }

  // Plots of the chosen features, then of the chosen commands (learner dashed, expert solid).
  // o: {steps, view, features, plotted, commands: {names, plotted, discrete, actions}, covered,
  //     contextSeconds}
  function plots(box, o) {
    box.textContent = "";
    var steps = o.steps;
    var t0 = steps[steps.length - 1].time_s;
    var span = t0 - steps[0].time_s > 0 ? t0 - steps[0].time_s : o.contextSeconds;
    if (steps.length === 1) {
      var note = document.createElement("p");
      note.className = "muted";
      note.textContent = "No earlier steps in this rollout.";
      box.appendChild(note);
    }
    o.plotted.forEach(function (f) {
      var feature = o.features[f];
      var values = steps.map(function (st) { return st.features[f]; });
      var unit = feature.unit ? " " + feature.unit : "";
      var axis = axisRange(values);
      plot(box, o,
        feature.name + (feature.unit ? " (" + feature.unit + ")" : "") + ": " + fmt(values[o.view]) +
          (o.view === steps.length - 1 ? " now" : " at " + timeOffset(steps[o.view], t0)),
        feature.name + " over the last " + fmt(span) + " s: from " + fmt(Math.min.apply(null, values)) +
          " to " + fmt(Math.max.apply(null, values)) + unit + ", now " + fmt(values[values.length - 1]) + unit,
        [{ values: values, cls: "plot-line" }], axis);
    });
    var c = o.commands;
    c.plotted.forEach(function (d) {
      function pick(action) {
        if (action === null || action === undefined) return null;
        if (c.discrete) return c.actions.indexOf(action);
        return action[d];
      }
      var learner = steps.map(function (st) { return pick(st.learner_command); });
      var expert = steps.map(function (st) { return pick(st.expert_command); });
      var shown = learner.concat(expert).filter(function (v) { return v !== null; });
      var axis;
      if (c.discrete) {
        axis = { lo: 0, hi: c.actions.length - 1, label: function (v) { return c.actions[Math.round(v)] || ""; } };
      } else {
        var dim = c.dimensions[d];
        axis = axisRange(shown.length ? shown : [dim.low, dim.high]);
      }
      var name = c.names[d];
      var said = shown.length ? "" : " (none known for these steps)";
      plot(box, o, "command " + name + ": learner dashed, expert solid" + said,
        "past commands of " + name + " over the last " + fmt(span) + " s" + said,
        [{ values: learner, cls: "plot-learner" }, { values: expert, cls: "plot-expert" }], axis);
    });
  }

  window.expertloopDraw = { fmt: fmt, scene: scene, plots: plots, timeOffset: timeOffset, axisRange: axisRange };
})();
