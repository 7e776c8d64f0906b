/* The evidence table of report.html: the rows are in the page; this adds sorting, filtering and
   expanding on top. Test lists come from the JSON block and are only ever placed with textContent. */
(function () {
  "use strict";
  var data = JSON.parse(document.getElementById("edgeproof-data").textContent);
  var tests = data.tests;
  var body = document.getElementById("pairs-body");
  var count = document.getElementById("pair-count");
  var rows = Array.prototype.slice.call(body.querySelectorAll("tr.pair"));
  var order = rows.slice();  /* the page's default order: linked first */
  var state = { key: null, dir: 1, words: [], show: "all" };
  var ncols = document.querySelectorAll("#pairs thead th").length;

  function el(tag, text, cls) {
    var node = document.createElement(tag);
    if (text !== undefined && text !== null) { node.textContent = String(text); }
    if (cls) { node.className = cls; }
    return node;
  }

  function fmtP(p) {
    if (p === null || p === undefined) { return "n/a"; }
    if (p < 1e-12) { return "< 1e-12"; }
    return p < 0.001 ? p.toPrecision(2) : p.toFixed(3);
  }

  function fmtNum(x) {
    if (x === null || x === undefined) { return ""; }
    if (Number.isInteger(x)) { return String(x); }
    if (x !== 0 && Math.abs(x) < 0.001) { return Number(x).toExponential(1); }
    if (Math.abs(x) >= 1000) { return String(Math.round(x)); }
    return Number(x).toPrecision(3);
  }

  function has(name, word) { return name.indexOf(word) >= 0; }

  function visible(tr) {
    var linked = tr.classList.contains("linked");
    if (state.show === "linked" && !linked) { return false; }
    if (state.show === "separated" && linked) { return false; }
    if (state.show === "flagged" && !tr.classList.contains("flagged")) { return false; }
    var w = state.words;
    if (!w.length) { return true; }
    var a = tr.getAttribute("data-a"), b = tr.getAttribute("data-b");
    if (w.length === 1) { return has(a, w[0]) || has(b, w[0]); }
    if (w.length === 2) { return (has(a, w[0]) && has(b, w[1])) || (has(a, w[1]) && has(b, w[0])); }
    return w.every(function (x) { return has(a, x) || has(b, x); });
  }

  function cellValue(tr, key) {
    var td = tr.querySelector("td." + key);
    if (!td) { return null; }
    var v = td.getAttribute("data-v");
    if (v === null || v === "") { return td.textContent === "" ? null : td.textContent; }
    var n = Number(v);
    return isNaN(n) ? v : n;
  }

  function compare(x, y) {
    var a = cellValue(x, state.key), b = cellValue(y, state.key);
    if (a === null || b === null) {
      if (a === null && b === null) { return order.indexOf(x) - order.indexOf(y); }
      return a === null ? 1 : -1; /* missing values last in both directions */
    }
    var c = (typeof a === "number" && typeof b === "number") ? a - b : String(a).localeCompare(String(b));
    return c !== 0 ? c * state.dir : order.indexOf(x) - order.indexOf(y);
  }

  function testList(key) {
    /* each test travels as an array in the order of data.fields */
    return (tests[key] || []).map(function (values) {
      var t = {};
      data.fields.forEach(function (f, i) { t[f] = values[i]; });
      return t;
    });
  }

  function testTable(tr) {
    var key = tr.getAttribute("data-pair");
    var list = testList(key);
    var total = data.counts[key] || list.length;
    var wrap = el("div");
    if (!list.length) {
      wrap.appendChild(el("p", "No test was run on this pair (forbidden by the configuration)."));
      return wrap;
    }
    if (total > list.length) {
      wrap.appendChild(el("p", total + " tests run on this pair; shown here, in the order they were run: the first, " +
        "the deciding one and those with the largest p-values (" + list.length + "). Every test is in tests.parquet."));
    } else {
      wrap.appendChild(el("p", list.length + (list.length === 1 ? " test" : " tests") + " run on this pair, in the order they were run:"));
    }
    var table = el("table", null, "tests");
    var head = el("tr");
    ["#", "set size", "conditioning set", "statistic", "dof", "p-value", "rows", "test", "reading", "notes"].forEach(function (h) {
      head.appendChild(el("th", h));
    });
    var thead = el("thead"); thead.appendChild(head); table.appendChild(thead);
    var tb = el("tbody");
    list.forEach(function (t) {
      var r = el("tr");
      r.appendChild(el("td", t.test_id, "num"));
      r.appendChild(el("td", t.level, "num"));
      r.appendChild(el("td", t.given_text));
      r.appendChild(el("td", fmtNum(t.statistic), "num"));
      r.appendChild(el("td", t.dof, "num"));
      r.appendChild(el("td", fmtP(t.pvalue), "num"));
      r.appendChild(el("td", t.n, "num"));
      r.appendChild(el("td", t.method));
      r.appendChild(el("td", t.independent ? "no evidence of dependence" : "dependent", t.independent ? "independent" : "dependent"));
      r.appendChild(el("td", t.notes));
      tb.appendChild(r);
    });
    table.appendChild(tb);
    wrap.appendChild(table);
    return wrap;
  }

  function toggle(tr, btn) {
    var next = tr.nextElementSibling;
    if (next && next.classList.contains("detail")) {
      body.removeChild(next);
      btn.textContent = "+";
      btn.setAttribute("aria-expanded", "false");
      return;
    }
    var detail = el("tr", null, "detail");
    detail.setAttribute("data-detail", tr.getAttribute("data-pair"));
    var td = el("td");
    td.colSpan = ncols;
    td.appendChild(testTable(tr));
    detail.appendChild(td);
    body.insertBefore(detail, tr.nextSibling);
    btn.textContent = "\u2212";
    btn.setAttribute("aria-expanded", "true");
  }

  function render() {
    var list = order.slice();
    if (state.key) { list.sort(compare); }
    var shown = 0;
    list.forEach(function (tr) {
      var detail = tr.nextElementSibling;
      var open = detail && detail.classList.contains("detail") ? detail : null;
      var on = visible(tr);
      tr.hidden = !on;
      body.appendChild(tr);
      if (open) { open.hidden = !on; body.appendChild(open); }
      if (on) { shown += 1; }
    });
    count.textContent = "showing " + shown + " of " + rows.length + " pairs";
  }

  rows.forEach(function (tr) {
    var btn = el("button", "+", "expand");
    btn.type = "button";
    btn.setAttribute("aria-expanded", "false");
    btn.setAttribute("aria-label", "show the tests on this pair");
    btn.addEventListener("click", function () { toggle(tr, btn); });
    tr.querySelector("td.x").appendChild(btn);
  });

  document.querySelectorAll("#pairs thead th[data-key]").forEach(function (th) {
    th.querySelector("button").addEventListener("click", function () {
      var key = th.getAttribute("data-key");
      if (state.key === key) { state.dir = -state.dir; } else { state.key = key; state.dir = 1; }
      document.querySelectorAll("#pairs thead th[data-key]").forEach(function (other) {
        other.removeAttribute("aria-sort");
      });
      th.setAttribute("aria-sort", state.dir > 0 ? "ascending" : "descending");
      render();
    });
  });

  document.getElementById("pair-filter").addEventListener("input", function (ev) {
    state.words = ev.target.value.toLowerCase().split(/[\s,]+/).filter(function (w) { return w.length > 0; });
    render();
  });

  document.querySelectorAll(".controls button[data-show]").forEach(function (b) {
    b.addEventListener("click", function () {
      state.show = b.getAttribute("data-show");
      document.querySelectorAll(".controls button[data-show]").forEach(function (o) {
        o.setAttribute("aria-pressed", o === b ? "true" : "false");
      });
      render();
    });
  });

  render();
}());
