// expertloop bench: "My recent labels", the caller's last 20 answers, to undo or change.
// Plain JavaScript, no libraries. bench.js creates it with window.expertloopRecent(options).
(function () {
  "use strict";

  window.expertloopRecent = function (o) {
    var panel = document.getElementById("recent");
    var list = document.getElementById("recent-list");
    var toggleButton = document.getElementById("recent-toggle");
    var labels = [];
    var selected = 0;
    var busy = false;

    function isOpen() { return !panel.hidden; }

    function when(iso) {
      var d = new Date(iso);
      return d.toLocaleTimeString([], { hour: "2-digit", minute: "2-digit", second: "2-digit" });
    }

    function row(label, index) {
      var li = document.createElement("li");
      li.className = "recent-row";
      li.tabIndex = -1;
      li.dataset.labelId = String(label.id);
      var what = document.createElement("span");
      what.className = "recent-what";
      what.textContent = "rollout " + label.state.rollout + ", step " + label.state.step + ": " + o.describe(label);
      var state = document.createElement("span");
      state.className = "recent-state";
      state.textContent = (label.replaces ? "changed · " : "") +
        (label.in_snapshot ? "in " + label.in_snapshot + ": change to correct" : "in no snapshot yet") +
        " · " + when(label.created_at);
      var change = document.createElement("button");
      change.type = "button";
      change.textContent = "Change";
      change.addEventListener("click", function () { pick(index); changeSelected(); });
      var undo = document.createElement("button");
      undo.type = "button";
      undo.textContent = "Undo";
      undo.disabled = !label.can_undo;
      undo.title = label.can_undo ? "take this answer back; the state returns to your queue"
        : label.in_snapshot + " holds it: change it instead";
      undo.addEventListener("click", function () { pick(index); undoSelected(); });
      li.append(what, state, change, undo);
      return li;
    }

    function render() {
      list.textContent = "";
      labels.forEach(function (label, i) { list.appendChild(row(label, i)); });
      document.getElementById("recent-none").hidden = labels.length > 0;
      pick(Math.min(selected, Math.max(labels.length - 1, 0)));
    }

    function pick(index) {
      selected = index;
      list.querySelectorAll(".recent-row").forEach(function (li, i) {
        li.setAttribute("aria-current", i === index ? "true" : "false");
        if (i === index && isOpen()) li.focus();
      });
    }

    function refresh() {
      return o.call("GET", o.api + "/my-labels").then(function (r) {
        if (!r.ok) { o.setStatus(o.detail(r), true); return; }
        labels = r.data.items;
        render();
      }, function () { o.setStatus("The server cannot be reached.", true); });
    }

    function open() {
      panel.hidden = false;
      toggleButton.setAttribute("aria-expanded", "true");
      selected = 0;
      labels = [];  // no keys act on a list older than this opening
      render();
      refresh();
    }

    function close() {
      panel.hidden = true;
      toggleButton.setAttribute("aria-expanded", "false");
      o.onClose();
    }

    function changeSelected() {
      var label = labels[selected];
      if (!label) return;
      panel.hidden = true;
      toggleButton.setAttribute("aria-expanded", "false");
      o.onChange(label);
    }

    function undoSelected() {
      var label = labels[selected];
      if (!label || busy) return;
      if (!label.can_undo) {
        o.setStatus(label.in_snapshot + " already holds that answer; change it instead (C).", true);
        return;
      }
      busy = true;
      o.call("POST", o.api + "/my-labels/" + label.id + "/undo", { submission_id: o.newId() }).then(function (r) {
        busy = false;
        if (!r.ok) { o.setStatus(o.detail(r), true); refresh(); return; }
        o.onUndone("Undone: rollout " + label.state.rollout + ", step " + label.state.step +
          " is back in your queue.");
        refresh();
      }, function () { busy = false; o.setStatus("Not undone: the server cannot be reached.", true); });
    }

    // keys while the panel is open; returns true when the key was the panel's
    function handleKey(e) {
      switch (e.key) {
        case "ArrowDown": pick(Math.min(selected + 1, labels.length - 1)); break;
        case "ArrowUp": pick(Math.max(selected - 1, 0)); break;
        case "c": case "C": case "Enter": changeSelected(); break;
        case "Delete": case "Backspace": undoSelected(); break;
        case "Escape": case "l": case "L": close(); break;
        default: return false;
      }
      e.preventDefault();
      return true;
    }

    return {
      open: open, close: close, isOpen: isOpen, handleKey: handleKey,
      toggle: function () { if (isOpen()) close(); else open(); },
      changed: function () { if (isOpen()) refresh(); },
    };
  };
})();
