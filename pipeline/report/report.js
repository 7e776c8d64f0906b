/* The evidence table of report.html: sort, filter and expand. Data comes from the JSON block and is
   only ever placed with textContent. */
(function () {
  "use strict";
  var data = JSON.parse(document.getElementById("edgeproof-data").textContent);
  var pairs = data.pairs;
  var tests = data.tests;
  var columns = data.columns;
  var state = { key: null, dir: 1, text: "", show: "all", open: {} };
  var body = document.getElementById("pairs-body");
  var count = document.getElementById("pair-count");

  function el(tag, text, cls) {
    var node = document.createElement(tag);
    if (text !== undefined && text !== null) { node.textContent = String(text); }
    if (cls) { node.className = cls; }
    return node;
  }

  function fmtP(p) {
    if (p === null || p === undefined) { return "n/a"; }
    if (p === 0) { return "< 1e-300"; } /* below double precision */
    return p < 0.001 ? p.toPrecision(2) : p.toFixed(3);
  }

  function fmtNum(x) {
    if (x === null || x === undefined) { return ""; }
    if (Number.isInteger(x)) { return String(x); }
    if (x !== 0 && Math.abs(x) < 0.001) { return Number(x).toExponential(1); }
    if (Math.abs(x) >= 1000) { return String(Math.round(x)); }
    return Number(x).toPrecision(3);
  }

  function show(col, value) {
    if (col.type === "p") { return value === null ? "" : fmtP(value); }
    if (col.type === "num") { return fmtNum(value); }
    return value === null || value === undefined ? "" : String(value);
  }

  function visible(pair) {
    if (state.show === "linked" && !pair.linked) { return false; }
    if (state.show === "separated" && pair.linked) { return false; }
    if (state.show === "flagged" && !pair.flags) { return false; }
    if (state.text) {
      var t = state.text;
      return pair.a.toLowerCase().indexOf(t) >= 0 || pair.b.toLowerCase().indexOf(t) >= 0;
    }
    return true;
  }

  function compare(x, y) {
    var col = state.key;
    var a = x[col], b = y[col];
    var aNull = a === null || a === undefined || a === "";
    var bNull = b === null || b === undefined || b === "";
    if (aNull || bNull) {
      if (aNull && bNull) { return x.id - y.id; }
      return aNull ? 1 : -1; /* missing values last in both directions */
    }
    var c;
    if (typeof a === "number" && typeof b === "number") { c = a - b; }
    else if (typeof a === "boolean") { c = (a === b) ? 0 : (a ? -1 : 1); }
    else { c = String(a).localeCompare(String(b)); }
    return c !== 0 ? c * state.dir : x.id - y.id;
  }

  function testTable(pair) {
    var rows = tests[String(pair.id)] || [];
    var wrap = el("div");
    if (!rows.length) {
      wrap.appendChild(el("p", "No test was run on this pair (for example: forbidden by expert knowledge)."));
      return wrap;
    }
    wrap.appendChild(el("p", rows.length + (rows.length === 1 ? " test" : " tests") + " run on " + pair.a + " and " + pair.b + ", in the order they were run:"));
    var table = el("table", null, "tests");
    var head = el("tr");
    ["#", "set size", "conditioning set", "statistic", "dof", "p-value", "rows", "test", "decision", "notes"].forEach(function (h) {
      head.appendChild(el("th", h));
    });
    var thead = el("thead"); thead.appendChild(head); table.appendChild(thead);
    var tb = el("tbody");
    rows.forEach(function (t) {
      var tr = el("tr");
      tr.appendChild(el("td", t.test_id, "num"));
      tr.appendChild(el("td", t.level, "num"));
      tr.appendChild(el("td", t.given_text));
      tr.appendChild(el("td", fmtNum(t.statistic), "num"));
      tr.appendChild(el("td", t.dof, "num"));
      tr.appendChild(el("td", fmtP(t.pvalue), "num"));
      tr.appendChild(el("td", t.n, "num"));
      tr.appendChild(el("td", t.method));
      tr.appendChild(el("td", t.independent ? "independent" : "dependent", t.independent ? "independent" : "dependent"));
      tr.appendChild(el("td", t.notes));
      tb.appendChild(tr);
    });
    table.appendChild(tb);
    wrap.appendChild(table);
    return wrap;
  }

  function render() {
    var list = pairs.filter(visible);
    if (state.key) { list.sort(compare); }
    while (body.firstChild) { body.removeChild(body.firstChild); }
    list.forEach(function (pair) {
      var tr = el("tr", null, "pair " + (pair.linked ? "linked" : "separated"));
      tr.setAttribute("data-pair", String(pair.id));
      var first = el("td");
      var btn = el("button", state.open[pair.id] ? "\u2212" : "+", "expand");
      btn.type = "button";
      btn.setAttribute("aria-expanded", state.open[pair.id] ? "true" : "false");
      btn.setAttribute("aria-label", "show the tests on " + pair.a + " and " + pair.b);
      btn.addEventListener("click", function () {
        state.open[pair.id] = !state.open[pair.id];
        render();
      });
      first.appendChild(btn);
      tr.appendChild(first);
      columns.forEach(function (col) {
        var cls = (col.type === "num" || col.type === "p") ? "num" : col.key;
        tr.appendChild(el("td", show(col, pair[col.key]), cls));
      });
      body.appendChild(tr);
      if (state.open[pair.id]) {
        var detail = el("tr", null, "detail");
        detail.setAttribute("data-detail", String(pair.id));
        var td = el("td");
        td.colSpan = columns.length + 1;
        td.appendChild(testTable(pair));
        detail.appendChild(td);
        body.appendChild(detail);
      }
    });
    count.textContent = "showing " + list.length + " of " + pairs.length + " pairs";
  }

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
    state.text = ev.target.value.trim().toLowerCase();
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
