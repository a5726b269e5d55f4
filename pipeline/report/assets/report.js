/* lesion-growth QA report: collect the reviewer's marks into corrections.tsv.
   Plain JavaScript, no server, nothing sent anywhere. Columns: subject session component lesion
   note. lesion is a lesion id (move the component there) or "new" (detach it into a lesion of its
   own). Every control of one component (subject, session, component) shows the same choice. */
(function () {
  "use strict";

  var COLUMNS = ["subject", "session", "component", "lesion", "note"];
  var state = {};

  function keyOf(el) {
    return [el.dataset.subject, el.dataset.session, el.dataset.component].join("\u0000");
  }

  function entry(key) {
    if (!state[key]) {
      state[key] = { lesion: "", note: "" };
    }
    return state[key];
  }

  function controls() {
    return document.querySelectorAll(".qa-wrong, .qa-move, .qa-note");
  }

  function clean(text) {
    return String(text).replace(/[\t\r\n]+/g, " ").trim();
  }

  function rows() {
    var seen = {};
    var out = [];
    controls().forEach(function (el) {
      var key = keyOf(el);
      if (seen[key]) {
        return;
      }
      seen[key] = true;
      var choice = state[key];
      if (choice && choice.lesion !== "") {
        out.push([el.dataset.subject, el.dataset.session, el.dataset.component,
                  choice.lesion, clean(choice.note)].map(clean));
      }
    });
    return out;
  }

  function tsv() {
    return [COLUMNS].concat(rows()).map(function (r) { return r.join("\t"); }).join("\n") + "\n";
  }

  function sync(key) {
    var choice = entry(key);
    controls().forEach(function (el) {
      if (keyOf(el) !== key) {
        return;
      }
      if (el.classList.contains("qa-wrong")) {
        el.checked = choice.lesion === "new";
      } else if (el.classList.contains("qa-move")) {
        el.value = choice.lesion;
      } else if (el.value !== choice.note) {
        el.value = choice.note;
      }
      var row = el.closest("tr");
      if (row) {
        row.classList.toggle("qa-marked", choice.lesion !== "");
      }
    });
  }

  function refresh() {
    var n = rows().length;
    var preview = document.getElementById("corrections-preview");
    if (preview) {
      preview.textContent = tsv();
    }
    ["corrections-count", "corrections-count-bar"].forEach(function (id) {
      var el = document.getElementById(id);
      if (el) {
        el.textContent = String(n);
      }
    });
  }

  function onChange(event) {
    var el = event.target;
    if (!el.dataset || el.dataset.component === undefined) {
      return;
    }
    var key = keyOf(el);
    var choice = entry(key);
    if (el.classList.contains("qa-wrong")) {
      choice.lesion = el.checked ? "new" : (choice.lesion === "new" ? "" : choice.lesion);
    } else if (el.classList.contains("qa-move")) {
      choice.lesion = el.value;
    } else if (el.classList.contains("qa-note")) {
      choice.note = el.value;
    }
    sync(key);
    refresh();
  }

  function save() {
    var blob = new Blob([tsv()], { type: "text/tab-separated-values" });
    var url = URL.createObjectURL(blob);
    var link = document.createElement("a");
    link.href = url;
    link.download = "corrections.tsv";
    link.style.display = "none";
    document.body.appendChild(link);
    link.click();
    window.setTimeout(function () {
      URL.revokeObjectURL(url);
      link.remove();
    }, 1000);
  }

  function clear() {
    Object.keys(state).forEach(function (key) {
      state[key] = { lesion: "", note: "" };
      sync(key);
    });
    refresh();
  }

  function init() {
    document.addEventListener("change", onChange);
    document.addEventListener("input", function (event) {
      if (event.target.classList && event.target.classList.contains("qa-note")) {
        onChange(event);
      }
    });
    var saveButton = document.getElementById("save-corrections");
    if (saveButton) {
      saveButton.addEventListener("click", save);
    }
    var clearButton = document.getElementById("clear-corrections");
    if (clearButton) {
      clearButton.addEventListener("click", clear);
    }
    refresh();
  }

  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", init);
  } else {
    init();
  }
}());
