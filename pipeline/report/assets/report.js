/* lesion-growth QA report: the review queue and corrections.tsv, on every page of one report.
   Plain JavaScript, no server, nothing sent anywhere. Columns of corrections.tsv: subject session
   component lesion note. lesion is a lesion id (move the component there) or "new" (detach it into
   a lesion of its own). Every control of one component shows the same choice. Marks are kept in
   the browser's localStorage under the report's folder (the folder of report.html), so the pages
   of one report share them and two reports never mix (file pages share one storage in Chromium
   and Firefox); without storage they stay on the page until it is closed. The pages carry no id
   of their own, so the same OUT gives the same files wherever it lies. */
(function () {
  "use strict";

  var COLUMNS = ["subject", "session", "component", "lesion", "note"];
  var body = document.body;
  var root = body.dataset.root || "";
  var queue = window.LESION_GROWTH_QUEUE || { items: [] };
  var folder = location.pathname.slice(0, location.pathname.lastIndexOf("/") + 1);
  if (!root) {
    folder = folder.replace(/report\/$/, "");    /* a subject page: its report's folder */
  }
  var prefix = "lesion-growth:" + folder + ":";
  var memory = {};

  function load(name, fallback) {
    try {
      var text = window.localStorage.getItem(prefix + name);
      return text ? JSON.parse(text) : fallback;
    } catch (e) {
      return memory[name] !== undefined ? memory[name] : fallback;
    }
  }

  function store(name, value) {
    memory[name] = value;
    try {
      window.localStorage.setItem(prefix + name, JSON.stringify(value));
    } catch (e) { /* no storage here: the marks stay on this page */ }
  }

  /* ---- corrections ---- */
  var marks = load("marks", {});   /* key -> [subject, session, component, lesion, note] */

  function keyOf(el) {
    return [el.dataset.subject, el.dataset.session, el.dataset.component].join("\u0000");
  }

  function clean(text) {
    return String(text).replace(/[\t\r\n]+/g, " ").trim();
  }

  function rows() {
    return Object.keys(marks).map(function (k) { return marks[k]; })
      .filter(function (m) { return m[3] !== ""; })
      .map(function (m) { return m.map(clean); });
  }

  function tsv() {
    return [COLUMNS].concat(rows()).map(function (r) { return r.join("\t"); }).join("\n") + "\n";
  }

  function controls() {
    return document.querySelectorAll(".qa-wrong, .qa-move, .qa-note");
  }

  function showAll() {
    controls().forEach(function (el) {
      var m = marks[keyOf(el)] || ["", "", "", "", ""];
      if (el.classList.contains("qa-wrong")) {
        el.checked = m[3] === "new";
      } else if (el.classList.contains("qa-move")) {
        el.value = m[3];
      } else if (el.value !== m[4] && document.activeElement !== el) {
        el.value = m[4];
      }
      var row = el.closest("tr");
      if (row) {
        row.classList.toggle("qa-marked", m[3] !== "");
      }
    });
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
    var m = marks[key] || [el.dataset.subject, el.dataset.session, el.dataset.component, "", ""];
    if (el.classList.contains("qa-wrong")) {
      m[3] = el.checked ? "new" : (m[3] === "new" ? "" : m[3]);
    } else if (el.classList.contains("qa-move")) {
      m[3] = el.value;
    } else if (el.classList.contains("qa-note")) {
      m[4] = el.value;
    }
    if (m[3] === "" && m[4] === "") {
      delete marks[key];
    } else {
      marks[key] = m;
    }
    store("marks", marks);
    showAll();
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
    marks = {};
    store("marks", marks);
    showAll();
  }

  /* ---- review queue ---- */
  var filter = load("filter", { kind: "", group: "" });

  function items() {
    return queue.items.filter(function (item) {
      return (!filter.kind || item.k === filter.kind) && (!filter.group || item.g === filter.group);
    });
  }

  function address(item) {
    return new URL(root + item.h, location.href);
  }

  function position(list) {
    for (var i = 0; i < list.length; i += 1) {
      var url = address(list[i]);
      if (url.pathname === location.pathname && url.hash === location.hash) {
        return i;
      }
    }
    var saved = load("position", -1);
    return saved < list.length ? saved : -1;
  }

  function go(step) {
    var list = items();
    if (!list.length) {
      return;
    }
    var i = position(list);
    i = i < 0 ? (step > 0 ? 0 : list.length - 1) : (i + step + list.length) % list.length;
    store("position", i);
    var url = address(list[i]);
    if (url.pathname === location.pathname) {
      location.hash = url.hash;
      showQueue();
    } else {
      location.href = url.href;
    }
  }

  function fill(select, values, chosen) {
    if (!select) {
      return;
    }
    values.forEach(function (v) {
      var option = document.createElement("option");
      option.value = v;
      option.textContent = v;
      select.appendChild(option);
    });
    select.value = chosen;
    select.addEventListener("change", function () {
      filter = { kind: document.getElementById("queue-kind").value,
                 group: document.getElementById("queue-group").value };
      store("filter", filter);
      store("position", -1);
      showQueue();
    });
  }

  function unique(field) {
    var seen = {};
    queue.items.forEach(function (item) {
      if (item[field]) {
        seen[item[field]] = true;
      }
    });
    return Object.keys(seen);
  }

  function showQueue() {
    var list = items();
    var i = position(list);
    var where = document.getElementById("queue-position");
    var what = document.getElementById("queue-current");
    if (where) {
      where.textContent = !list.length ? "no flagged items" + (queue.items.length ? " in this filter" : "")
        : (i < 0 ? list.length + " flagged items: press next to start"
          : "item " + (i + 1) + " of " + list.length);
    }
    if (what) {
      what.textContent = i < 0 ? "" : list[i].k + " · " + list[i].s + ": " + list[i].t;
    }
  }

  function onKey(event) {
    var tag = (event.target.tagName || "").toLowerCase();
    if (tag === "input" || tag === "select" || tag === "textarea" || event.altKey ||
        event.ctrlKey || event.metaKey) {
      return;
    }
    if (event.key === "j" || event.key === "n") {
      go(1);
      event.preventDefault();
    } else if (event.key === "k" || event.key === "p") {
      go(-1);
      event.preventDefault();
    }
  }

  function init() {
    document.addEventListener("change", onChange);
    document.addEventListener("input", function (event) {
      if (event.target.classList && event.target.classList.contains("qa-note")) {
        onChange(event);
      }
    });
    document.addEventListener("keydown", onKey);
    window.addEventListener("storage", function (event) {
      if (event.key === prefix + "marks") {
        marks = load("marks", {});
        showAll();
      }
    });
    window.addEventListener("hashchange", showQueue);
    [["save-corrections", save], ["clear-corrections", clear],
     ["queue-next", function () { go(1); }], ["queue-prev", function () { go(-1); }]]
      .forEach(function (pair) {
        var el = document.getElementById(pair[0]);
        if (el) {
          el.addEventListener("click", pair[1]);
        }
      });
    fill(document.getElementById("queue-kind"), unique("k"), filter.kind);
    fill(document.getElementById("queue-group"), unique("g"), filter.group);
    showAll();
    showQueue();
  }

  if (document.readyState === "loading") {
    document.addEventListener("DOMContentLoaded", init);
  } else {
    init();
  }
}());
