"""Property tests of the report stage on small hand-built tables (synthetic data: properties only)."""

from __future__ import annotations

import csv
import io
import json
import re
import shutil
import subprocess
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from pipeline.errors import EdgeproofError
from pipeline.report import read_review_file
from pipeline.report._exports import neutralise, unneutralise
from pipeline.stages.report import ReportContext, run

ROOT = Path(__file__).resolve().parents[1]
EVIL = "<img src=x onerror=alert(1)>"
QUOTY = 'say "hi" \\ back\\'
FILES = {"evidence.csv", "graph.dot", "graph.svg", "graph.png", "graph.graphml", "graph.json", "report.html"}

needs_dot = pytest.mark.skipif(
    shutil.which("dot") is None, reason="Graphviz `dot` is not installed (make setup installs it)"
)


def _evidence() -> pd.DataFrame:
    rows = [
        # var_a, var_b, linked, p, given, n_tests, cmi, q, sparse, knowledge, orientation, flags
        (EVIL, "alpha", True, 0.003, "beta;" + QUOTY, 6, 0.08, 0.004, False, "", f"{EVIL} -> alpha", ""),
        (EVIL, "beta", False, 0.41, "alpha", 3, 0.001, np.nan, False, "", "", ""),
        (EVIL, QUOTY, True, 0.2, "", 1, 0.01, 0.2, True, "", "ambiguous", "sparse"),
        ("alpha", "beta", True, 1e-12, "", 4, 0.35, 1e-11, False, "required", "alpha -- beta", "required"),
        ("alpha", QUOTY, False, 0.7, EVIL, 2, 0.0004, np.nan, False, "", "", ""),
        ("beta", QUOTY, True, 0.01, "alpha", 3, 0.05, 0.012, False, "", "beta -> " + QUOTY, ""),
    ]
    cols = ["var_a", "var_b", "linked", "pvalue", "given", "n_tests", "cmi_bits", "qvalue", "sparse",
            "knowledge", "orientation", "flags"]
    ev = pd.DataFrame(rows, columns=cols)
    ev["statistic"] = 12.5
    ev["dof"] = 3
    ev["n"] = 400
    ev["level"] = [2, 1, 0, 0, 1, 1]
    ev["method"] = "g"
    ev["max_given_size"] = 2
    ev["cramers_v"] = 0.2
    ev["degenerate"] = False
    ev["policy_applied"] = False
    ev["data_disagrees"] = False
    ev["stability"] = np.nan
    ev["explanation"] = ""
    return ev


def _tests() -> pd.DataFrame:
    rows = []
    for i, (a, b, given, p) in enumerate([
        (EVIL, "alpha", "", 1e-5), ("alpha", EVIL, "beta", 0.001), (EVIL, "alpha", "beta;" + QUOTY, 0.003),
        (EVIL, "beta", "", 0.02), (EVIL, "beta", "alpha", 0.41), ("alpha", "beta", "", 1e-12),
    ]):
        rows.append({"test_id": i, "level": len([g for g in given.split(";") if g]), "var_a": a, "var_b": b,
                     "given": given, "given_size": len([g for g in given.split(";") if g]),
                     "statistic": 3.0, "dof": 1, "pvalue": p, "n": 400, "method": "g", "cmi_bits": 0.01,
                     "sparse": False, "degenerate": False, "independent": p > 0.05, "policy": "flag"})
    return pd.DataFrame(rows)


def _context(**over) -> ReportContext:
    base = {
        "title": "Synthetic <run> & co",
        "summary": {"input": "/data/x.csv", "rows": {"read": 410, "kept": 400, "rejected": 4, "quarantined": 6},
                 "columns_dropped": {"row_id": "unique identifier", EVIL: "constant"},
                 "settings": {"test": {"alpha": 0.05, "method": "g"}}, "timings": {"ingest": 0.12}},
        "levels": {EVIL: ["=1+2", "plain"], "alpha": ["[0, 1)", "[1, 2]"], "beta": ["-3", "-x", "@home"],
                QUOTY: ["yes", "no"]},
        "alpha": 0.05,
        "orient": True,
        "truth_edges": [(EVIL, "alpha"), ("alpha", "beta"), ("beta", "gamma")],
        "warnings": [f"column {EVIL} looks odd"],
    }
    base.update(over)
    return ReportContext(**base)


@pytest.fixture(scope="module")
def report_dir(tmp_path_factory):
    if shutil.which("dot") is None:
        pytest.skip("Graphviz `dot` is not installed (make setup installs it)")
    out = tmp_path_factory.mktemp("report")
    files = run(_evidence(), _tests(), _context(), out)
    return out, files


def _embedded(html_text: str) -> dict:
    m = re.search(r'<script type="application/json" id="edgeproof-data">(.*?)</script>', html_text, re.DOTALL)
    assert m is not None
    return json.loads(m.group(1))


def test_every_file_is_written(report_dir):
    """The stage writes the seven report files, all non-empty, and leaves no temporary files."""
    out, files = report_dir
    assert set(files) == FILES
    for name, path in files.items():
        assert path == out / name and path.stat().st_size > 0
    assert not [p for p in out.iterdir() if p.name.startswith(".") or p.suffix == ".tmp"]
    assert (out / "graph.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_html_escapes_hostile_names(report_dir):
    """A column named like an img tag never appears raw in report.html; its escaped forms do."""
    text = (report_dir[0] / "report.html").read_text(encoding="utf-8")
    assert "<img" not in text
    assert "&lt;img src=x onerror=alert(1)&gt;" in text  # server-side html.escape and SVG text
    assert 'data-a="&lt;img src=x onerror=alert(1)&gt;"' in text  # in the row's filter attribute
    block = re.search(r'id="edgeproof-data">(.*?)</script>', text, re.DOTALL).group(1)
    assert "<" not in block and ">" not in block and "&" not in block  # JSON escapes them
    assert "=1+2" in text and "Synthetic &lt;run&gt; &amp; co" in text


def test_html_has_no_external_references(report_dir):
    """report.html loads nothing from elsewhere: no remote src, no link element, no @import, no url()."""
    text = (report_dir[0] / "report.html").read_text(encoding="utf-8")
    for needle in ('src="http', "src='http", "<link", "@import", "url(", "<iframe", "<img"):
        assert needle not in text
    assert re.search(r"<script[^>]+src=", text) is None
    assert "<svg" in text and "<?xml" not in text and "<!DOCTYPE svg" not in text


def _rows(html_text: str) -> list[str]:
    return re.findall(r'<tr class="pair[^"]*"[^>]*>.*?</tr>', html_text, re.DOTALL)


def test_rows_are_in_the_page_linked_first_and_tests_embedded(report_dir):
    """The table rows are real HTML (one per pair, linked pairs first by p-value); every test is in the JSON block."""
    text = (report_dir[0] / "report.html").read_text(encoding="utf-8")
    rows = _rows(text)
    ev = _evidence()
    assert len(rows) == len(ev)
    ids = [int(re.search(r'data-pair="(\d+)"', r).group(1)) for r in rows]
    assert sorted(ids) == list(range(len(ev)))
    outcomes = ["linked" if 'class="pair linked' in r else "separated" for r in rows]
    assert outcomes == ["linked"] * 4 + ["separated"] * 2
    assert ids[:4] == [3, 0, 5, 2]  # linked, by p-value: 1e-12, 0.003, 0.01, 0.2
    data = _embedded(text)
    assert sum(len(v) for v in data["tests"].values()) == len(_tests())
    assert len(data["tests"]["0"]) == 3 and data["counts"]["0"] == 3  # EVIL-alpha, one written as (alpha, EVIL)
    given = data["fields"].index("given_text")
    assert data["tests"]["0"][2][given] == "{beta, " + QUOTY + "}"
    separated = rows[ids.index(1)]
    assert "separated: no evidence of dependence given {alpha} (p = 0.410" in separated
    assert "independent" not in re.sub(r"<[^>]+>", "", separated)


def test_page_carries_at_most_a_few_tests_per_pair():
    """A pair with 500 tests carries TESTS_PER_PAIR of them in the page (the first, the last before
    orientation, the largest p-values) and its count; a pair with few carries all (invented tables)."""
    from pipeline.report._html import TESTS_PER_PAIR, tests_data

    ev = pd.DataFrame({"var_a": ["a", "a"], "var_b": ["b", "c"]})
    rng = np.random.default_rng(3)
    p = rng.random(500)
    many = pd.DataFrame({"test_id": np.arange(500), "var_a": "b", "var_b": "a", "given": "c", "level": 1,
                         "statistic": 1.0, "dof": 1, "pvalue": p, "n": 10, "method": "g", "independent": p > 0.05,
                         "sparse": False, "degenerate": False, "policy_applied": False, "policy": "flag",
                         "phase": ["skeleton"] * 499 + ["orientation"]})
    few = many.iloc[:3].assign(var_a="a", var_b="c", test_id=[500, 501, 502], phase="battery")
    data = tests_data(ev, pd.concat([many, few], ignore_index=True))
    shown = data["tests"]["0"]
    ids = [t[data["fields"].index("test_id")] for t in shown]
    assert len(shown) == TESTS_PER_PAIR and data["counts"] == {"0": 500, "1": 3}
    assert ids == sorted(ids) and ids[0] == 0 and 498 in ids  # first, and last before orientation
    top = set(np.argsort(-p, kind="stable")[: TESTS_PER_PAIR - 2].tolist())
    assert top <= set(ids)
    assert [t[0] for t in data["tests"]["1"]] == [500, 501, 502]


def test_honest_numbers_floor_near_alpha_and_labels(tmp_path):
    """p-values below 1e-12 read "< 1e-12"; a pair decided near alpha carries a visible mark; V is labelled unconditioned."""
    if shutil.which("dot") is None:
        pytest.skip("Graphviz `dot` is not installed")
    ev = _evidence()
    ev.loc[3, "pvalue"] = 1e-30  # alpha-beta
    ev.loc[1, "pvalue"] = 0.06  # EVIL-beta separated at 0.06: within a factor 2 of alpha 0.05
    files = run(ev, _tests(), _context(), tmp_path)
    text = files["report.html"].read_text(encoding="utf-8")
    rows = {int(re.search(r'data-pair="(\d+)"', r).group(1)): r for r in _rows(text)}
    shown = re.sub(r' data-v="[^"]*"', "", rows[3])  # the sort key keeps the value itself
    assert ">&lt; 1e-12<" in shown and "p &lt; 1e-12" in shown and "e-30" not in shown
    assert 'class="near"' in rows[1] and "near alpha" in rows[1]
    assert 'class="near"' not in rows[0]
    assert "Cram\u00e9r&#x27;s V, unconditioned" in text or "Cramér&#x27;s V, unconditioned" in text
    csv_rows = list(csv.reader(io.StringIO(files["evidence.csv"].read_text(encoding="utf-8"))))
    col = {h: i for i, h in enumerate(csv_rows[0])}
    near = {(r[col["signal A"]], r[col["signal B"]]): r[col["near alpha"]] for r in csv_rows[1:]}
    assert near[(EVIL, "beta")] == "yes" and near[("alpha", "beta")] == "no"


def test_dot_escapes_labels_and_renders(report_dir):
    """DOT labels carry names only as escaped text (no raw tag), and Graphviz accepts the file."""
    dot = (report_dir[0] / "graph.dot").read_text(encoding="utf-8")
    assert "<img" not in dot
    assert "label=<&lt;img src=x onerror=alert(1)&gt;>" in dot
    assert "&quot;hi&quot;" in dot
    done = subprocess.run(["dot", "-Tsvg"], input=dot.encode(), capture_output=True, check=False)
    assert done.returncode == 0, done.stderr
    svg = (report_dir[0] / "graph.svg").read_text(encoding="utf-8")
    assert "<img" not in svg and "&lt;img src=x onerror=alert(1)&gt;" in svg


def test_edge_styles_show_strength_and_sparse_is_a_marker(report_dir):
    """Line style shows strength (weak dashed, required double); a sparse pair keeps its style and gets a marker."""
    dot = (report_dir[0] / "graph.dot").read_text(encoding="utf-8")
    edges = [line for line in dot.splitlines() if " -> " in line and "[" in line]
    assert len(edges) == 4  # the four linked pairs
    sparse = next(e for e in edges if "flags: sparse" in e)
    assert "style=dotted" not in dot
    assert "style=dashed" in sparse  # its q-value 0.2 is above alpha: weak
    assert "\u25c7" in sparse  # the sparse marker on the line
    required = next(e for e in edges if "required" in e)
    assert "style=bold" in required and ":invis:" in required and "dir=none" in required
    assert "\u25c7" not in required
    oriented = [e for e in edges if "dir=forward" in e]
    assert len(oriented) == 2


def test_page_key_draws_line_samples(report_dir):
    """The graph's key on the page is drawn with SVG lines (dashed, double), not with characters."""
    text = (report_dir[0] / "report.html").read_text(encoding="utf-8")
    key = re.search(r'<div class="key">.*?</div>', text, re.DOTALL).group(0)
    assert key.count("<line ") >= 6 and 'stroke-dasharray="7 4"' in key
    assert "\u2501" not in text and "\u254d" not in text  # no box-drawing pseudo-lines


def test_csv_neutralises_formulas_and_reads_back(report_dir, tmp_path):
    """evidence.csv has readable headers, apostrophes before formula-like text, and round-trips a review."""
    raw = (report_dir[0] / "evidence.csv").read_text(encoding="utf-8")
    rows = list(csv.reader(io.StringIO(raw)))
    header = rows[0]
    assert header[:5] == ["signal A", "signal B", "outcome", "verdict", "comment"]
    assert all(r[3] == "" and r[4] == "" for r in rows[1:])
    assert {r[2] for r in rows[1:]} == {"linked", "separated"}
    col = {h: i for i, h in enumerate(header)}
    first = rows[1]
    assert first[col["levels of A"]] == "'=1+2 | plain"
    beta = next(r for r in rows[1:] if r[col["signal A"]] == "beta")
    assert beta[col["levels of A"]] == "'-3 | -x | @home"
    for r in rows[1:]:
        for cell in r:
            assert not cell or cell[0] not in "=+-@\t\r" or re.fullmatch(r"-?[\d.]+(e-?\d+)?", cell)
    assert len(rows) == 1 + len(_evidence())
    # a reviewer fills in two cells, one of them formula-like
    rows[1][3], rows[1][4] = "confirm", neutralise("=SUM(A1) is what I think")
    buf = io.StringIO()
    csv.writer(buf).writerows(rows)
    path = tmp_path / "reviewed.csv"
    path.write_text(buf.getvalue(), encoding="utf-8")
    review = read_review_file(path)
    assert list(review.columns) == ["var_a", "var_b", "verdict", "comment"]
    assert review.loc[0].to_dict() == {"var_a": EVIL, "var_b": "alpha", "verdict": "confirm",
                                       "comment": "=SUM(A1) is what I think"}
    assert len(review) == len(_evidence())


@pytest.mark.parametrize("cell", ["=1+2", "+x", "-x", "@x", "\tx", "\rx", "'=x", "'plain", "-1.5", "plain", ""])
def test_neutralise_round_trip(cell):
    """Neutralising then un-neutralising gives the cell back; plain numbers are left as they are."""
    out = neutralise(cell)
    assert unneutralise(out) == cell
    if cell[:1] in ("=", "+", "@", "\t", "\r") or cell in ("-x",):
        assert out.startswith("'")
    if cell == "-1.5":
        assert out == "-1.5"


def test_graphml_and_json_load_with_networkx(report_dir):
    """graph.graphml and graph.json load back into networkx with the evidence on the edges."""
    g = nx.read_graphml(report_dir[0] / "graph.graphml")
    assert g.number_of_nodes() == 4 and g.number_of_edges() == 4
    attrs = g.edges["alpha", "beta"]
    assert attrs["pvalue"] == pytest.approx(1e-12) and attrs["knowledge"] == "required"
    assert attrs["directed"] is False
    data = json.loads((report_dir[0] / "graph.json").read_text(encoding="utf-8"))
    h = nx.node_link_graph(data, edges="edges")
    assert sorted(map(sorted, h.edges())) == sorted(map(sorted, g.edges()))
    tip = [d for _, _, d in h.edges(data=True) if d["directed"]]
    assert {(d["tail"], d["head"]) for d in tip} == {(EVIL, "alpha"), ("beta", QUOTY)}


def test_truth_comparison_counts(report_dir):
    """With a known graph the page shows recovered, missed and extra counts (1 and 2 of 3; 2 extra)."""
    text = (report_dir[0] / "report.html").read_text(encoding="utf-8")
    assert "<b>2</b> of 3 true links recovered, <b>1</b> missed, <b>2</b> extra" in text
    assert text.count('<svg class="sample"') == 9 and text.count("<svg") == 11  # two graphs, two keys


def test_missing_dot_is_a_clear_error(tmp_path, monkeypatch):
    """Without Graphviz on PATH the stage raises an EdgeproofError that says how to install it."""
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    with pytest.raises(EdgeproofError, match=r"apt-get install graphviz"):
        run(_evidence(), _tests(), _context(), tmp_path / "out")
    assert not (tmp_path / "out" / "report.html").exists()


@needs_dot
def test_background_drawing_reports_graphviz_complaint_and_cleans_up(tmp_path, monkeypatch):
    """The drawing runs in its own Graphviz process while the page is prepared: DOT that Graphviz
    refuses is an EdgeproofError quoting its first complaint; leaving the block early (the report
    failed meanwhile) stops the process, and no temporary folder is left either way."""
    import tempfile

    import graphviz

    from pipeline.report._graph import Drawing

    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    bad = graphviz.Digraph()
    bad.body.append("  a -> ;\n")
    with pytest.raises(EdgeproofError, match=r"Graphviz failed to draw the test graph as svg: .*syntax error"):
        with Drawing(bad, ("svg",), "the test graph") as drawing:
            drawing.result()
    good = graphviz.Digraph(engine="neato")
    for i in range(200):
        good.edge(f"n{i}", f"n{(i * 7) % 200}")
    with pytest.raises(RuntimeError, match="page failed"):
        with Drawing(good, ("svg", "png")) as drawing:
            proc = drawing._proc
            raise RuntimeError("page failed")
    assert proc.poll() is not None  # stopped, not left running
    with Drawing(good, ("svg",)) as drawing:
        assert drawing.result()["svg"].lstrip().startswith(b"<?xml")
    assert not list(tmp_path.glob("edgeproof-graph-*"))


@needs_dot
def test_no_png_when_switched_off_and_missing_columns_refused(tmp_path):
    """png=False skips graph.png; an evidence table without var_a is refused with a DataError."""
    files = run(_evidence(), _tests(), _context(png=False, truth_edges=None), tmp_path)
    assert "graph.png" not in files and not (tmp_path / "graph.png").exists()
    with pytest.raises(ValueError, match="var_a"):
        run(_evidence().drop(columns=["var_a"]), _tests(), _context(), tmp_path)


@needs_dot
def test_forty_signals_use_a_spring_layout(tmp_path):
    """A 40-signal graph is laid out with neato (overlap removed) and renders to SVG."""
    rng = np.random.default_rng(0)
    names = [f"signal_{i:02d}" for i in range(40)]
    rows = []
    for i in range(40):
        for j in range(i + 1, 40):
            linked = bool(rng.random() < 0.06)
            rows.append({"var_a": names[i], "var_b": names[j], "linked": linked,
                         "pvalue": float(rng.random() * 0.01 if linked else 0.5), "given": "",
                         "n_tests": 1, "cmi_bits": float(rng.random() * 0.3), "qvalue": 0.01 if linked else np.nan,
                         "sparse": False, "knowledge": "", "orientation": "", "flags": ""})
    files = run(pd.DataFrame(rows), _tests().iloc[:0], ReportContext(levels={n: ["a", "b"] for n in names}),
                tmp_path)
    dot = files["graph.dot"].read_text()
    assert "layout=neato" in dot and "overlap=prism" in dot
    assert files["graph.svg"].read_text().count('class="node"') == 40


@needs_dot
def test_review_verdicts_show_in_table_and_csv(tmp_path):
    """A review passed in the context is carried into the page and the CSV verdict/comment cells."""
    review = {("alpha", "beta"): {"verdict": "confirm", "comment": "=known from incident drills"}}
    files = run(_evidence(), _tests(), _context(review=review), tmp_path)
    text = files["report.html"].read_text(encoding="utf-8")
    row = next(r for r in _rows(text) if 'data-pair="3"' in r)  # alpha - beta
    assert "Reviewer: confirm (=known from incident drills)" in row
    back = read_review_file(files["evidence.csv"])
    hit = back[(back.var_a == "alpha") & (back.var_b == "beta")].iloc[0]
    assert (hit.verdict, hit.comment) == ("confirm", "=known from incident drills")


# --------------------------------------------------------------------------- headless browser
def _chromium() -> str:
    path = shutil.which("chromium") or "/usr/bin/chromium"
    if not Path(path).exists() and shutil.which("apt-get"):
        for cmd in (["apt-get", "install", "-y", "-q", "chromium"], ["apt-get", "update", "-q"],
                    ["apt-get", "install", "-y", "-q", "chromium"]):
            subprocess.run(cmd, capture_output=True, check=False, timeout=900)
            if Path("/usr/bin/chromium").exists():
                path = "/usr/bin/chromium"
                break
    if not Path(path).exists():
        pytest.skip("Debian's chromium is not installed and `apt-get install -y chromium` did not work")
    return path


_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync"]


@pytest.fixture(scope="module")
def long_report(tmp_path_factory):
    """A report of 16 signals (120 pairs): long enough to scroll, with a night and a service name."""
    if shutil.which("dot") is None:
        pytest.skip("Graphviz `dot` is not installed (make setup installs it)")
    names = ["latency_ms", "error_burst", "cache_hit_rate", "queue_depth"] + [f"signal_{i:02d}" for i in range(12)]
    rng = np.random.default_rng(3)
    rows = []
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            linked = (a, b) in {("latency_ms", "error_burst"), ("cache_hit_rate", "latency_ms")} or rng.random() < 0.1
            p = float(rng.random() * 1e-4) if linked else float(0.06 + rng.random() * 0.9)
            rows.append({"var_a": min(a, b), "var_b": max(a, b), "linked": linked, "pvalue": p, "given": "",
                         "n_tests": 2, "cmi_bits": 0.1, "qvalue": p, "sparse": False, "knowledge": "",
                         "orientation": "", "flags": "", "explanation": ""})
    out = tmp_path_factory.mktemp("long")
    run(pd.DataFrame(rows), _tests().iloc[:0],
        ReportContext(title="checkout-api", night="2026-11-04", levels={n: ["lo", "hi"] for n in names},
                      show_changes=True, png=False), out)
    return out / "report.html", len(rows), sum(r["linked"] for r in rows)


@pytest.mark.browser
def test_long_report_in_headless_chromium(long_report):
    """With JS off the rows are there; with JS on the header row sticks, a pair filter finds one pair, the
    night is in the title, and at 1,024 px the outcome, flags and plain-words columns are on screen."""
    sync_api = pytest.importorskip("playwright.sync_api", reason="the `playwright` package is not installed")
    exe = _chromium()
    page_path, n_pairs, n_linked = long_report
    with sync_api.sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=exe, headless=True, args=_ARGS)
        try:
            plain = browser.new_context(java_script_enabled=False, viewport={"width": 1024, "height": 800})
            page = plain.new_page()
            page.goto(page_path.as_uri())
            assert page.locator("#pairs-body tr.pair").count() == n_pairs
            first = page.locator("#pairs-body tr.pair").first
            assert "linked" in first.get_attribute("class")  # linked pairs first, with no script
            assert page.locator("#pairs-body button.expand").count() == 0  # the script adds those
            plain.close()

            page = browser.new_page(viewport={"width": 1024, "height": 800})
            page.goto(page_path.as_uri())
            assert page.title() == "checkout-api \u2014 night of 2026-11-04"
            assert "night of 2026-11-04" in page.locator("h1").inner_text()
            assert "No previous night to compare with" in page.locator("#changes").inner_text()
            # the first screen: what changed, above the fold
            assert page.locator("#changes").bounding_box()["y"] < 800
            head = page.locator('#pairs thead th[data-key="outcome"]')
            for key in ("outcome", "flags", "reading"):
                box = page.locator(f'#pairs thead th[data-key="{key}"]').bounding_box()
                assert box["x"] >= 0 and box["x"] + box["width"] <= 1024, key
            # scroll deep into the table: the header row stays at the top of the window
            page.locator("#pairs-body tr.pair").nth(n_pairs - 10).scroll_into_view_if_needed()
            box = head.bounding_box()
            assert abs(box["y"]) < 2, box
            assert page.locator("#pairs-body tr.pair").nth(2).bounding_box()["y"] < 0  # rows did scroll under it
            # one name, then a pair in either order
            page.fill("#pair-filter", "latency")
            assert page.locator("#pairs-body tr.pair:visible").count() == 15
            page.fill("#pair-filter", "error latency")
            visible = page.locator("#pairs-body tr.pair:visible")
            assert visible.count() == 1
            assert "error_burst" in visible.first.inner_text() and "latency_ms" in visible.first.inner_text()
            assert "showing 1 of" in page.locator("#pair-count").inner_text()
            page.fill("#pair-filter", "")
            page.click('.controls button[data-show="linked"]')
            assert page.locator("#pairs-body tr.pair:visible").count() == n_linked
        finally:
            browser.close()


@pytest.mark.browser
def test_page_in_headless_chromium(report_dir):
    """In Chromium the table shows one row per pair, sorts, filters, expands a row and shows no alert."""
    sync_api = pytest.importorskip("playwright.sync_api", reason="the `playwright` package is not installed")
    exe = _chromium()
    page_url = (report_dir[0] / "report.html").as_uri()
    dialogs, requests = [], []
    with sync_api.sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=exe, headless=True, args=_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1400, "height": 1000})
            page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
            page.on("request", lambda r: requests.append(r.url))
            page.goto(page_url)
            rows = page.locator("#pairs-body tr.pair:visible")
            assert rows.count() == len(_evidence())
            assert "showing 6 of 6 pairs" in page.locator("#pair-count").inner_text()

            page.click('#pairs th[data-key="p"] button')
            assert rows.nth(0).locator("td.p").inner_text() == "1e-12"
            page.click('#pairs th[data-key="p"] button')
            assert rows.nth(0).locator("td.p").inner_text() == "0.700"
            assert page.get_attribute('#pairs th[data-key="p"]', "aria-sort") == "descending"

            page.click('.controls button[data-show="separated"]')
            assert rows.count() == 2
            page.click('.controls button[data-show="flagged"]')
            assert rows.count() == 2  # the sparse pair and the required pair
            page.click('.controls button[data-show="all"]')
            page.fill("#pair-filter", "BETA")
            assert rows.count() == 3  # case-insensitive: the three pairs with beta
            page.fill("#pair-filter", "")

            page.click('#pairs-body tr.pair[data-pair="1"] button.expand')
            detail = page.locator("#pairs-body tr.detail")
            assert detail.count() == 1
            assert detail.locator("tbody tr").count() >= 1
            assert "conditioning set" in detail.inner_text()
            page.click("#pairs-body tr.pair >> nth=0 >> button.expand")
            assert page.locator("#pairs-body tr.detail").count() == 2
            # the hostile name is shown as text, never turned into an element
            assert page.locator("#pairs-body img").count() == 0 and page.locator("img").count() == 0
            assert page.locator("#pairs-body td.pair", has_text=EVIL).count() >= 1
        finally:
            browser.close()
    assert dialogs == []
    assert all(u.startswith(("file:", "data:", "about:")) for u in requests)


@needs_dot
def test_render_report_html_adds_what_changed(tmp_path):
    """render_report_html re-renders a finished run folder's page with the changes since the previous night."""
    from pipeline.stages.report import render_report_html

    ctx = _context(truth_edges=None)
    run(_evidence(), _tests(), ctx, tmp_path)
    _evidence().to_parquet(tmp_path / "evidence.parquet")
    _tests().to_parquet(tmp_path / "tests.parquet")
    (tmp_path / "levels.json").write_text(json.dumps({"levels": ctx.levels}))
    (tmp_path / "manifest.json").write_text(json.dumps({
        "config": {"name": "checkout-api", "report": {}, "test": {"alpha": 0.05}, "search": {"orient": True}},
        "night": "2026-11-04", "rows": {"read": 410, "kept": 400}, "stages": {"report": {"seconds": 0.5}},
        "warnings": [], "review": [],
    }))
    assert "What changed since the previous night" not in (tmp_path / "report.html").read_text()  # ad hoc run
    page = render_report_html(tmp_path, None)
    text = page.read_text(encoding="utf-8")
    assert "<title>checkout-api \u2014 night of 2026-11-04</title>" in text
    assert "No previous night to compare with." in text
    changes = {
        "previous_run": "2026-11-03",
        "added": [{"var_a": "alpha", "var_b": "beta", "pvalue": 1e-9, "qvalue": 1e-8}],
        "removed": [],
        "unconfirmed": [{"var_a": "beta", "var_b": QUOTY, "pvalue": 0.3, "qvalue": 0.6}],
        "mechanism_changes": [{"signal": EVIL, "pvalue": 0.001, "qvalue": 0.004}],
        "diff_href": "../compare-2026-11-03-2026-11-04/diff.html",
        "history_href": "../history.html",
    }
    text = render_report_html(tmp_path, changes).read_text(encoding="utf-8")
    section = text[text.index('<section id="changes">'):text.index("</section>", text.index('<section id="changes">'))]
    assert "Compared with <b>2026-11-03</b>: <b>1</b> links added, <b>0</b> removed and <b>1</b> signals" in section
    assert "alpha \u2014 beta" in section and "&lt;img src=x onerror=alert(1)&gt;" in section and "<img" not in text
    assert 'href="../compare-2026-11-03-2026-11-04/diff.html"' in section and 'href="../history.html"' in section
    assert text.index('id="changes"') < text.index('id="graph"') < text.index('id="details"')  # timings last
    assert len(_rows(text)) == len(_evidence())


def test_shown_tests_from_arrow_equal_the_frame_path(tmp_path):
    """Picking the shown tests column by column from an Arrow table gives the page exactly the test
    lists and counts of the whole-frame path, with pairs of more tests than the page shows (property check)."""
    import pyarrow as pa

    from pipeline.report._html import TESTS_PER_PAIR, shown_tests, tests_data

    rng = np.random.default_rng(11)
    names = [f"s{i}" for i in range(6)]
    pairs = [(a, b) for i, a in enumerate(names) for b in names[i + 1:]]
    rows = []
    for t in range(900):
        a, b = pairs[int(rng.integers(len(pairs)))]
        if rng.random() < 0.5:
            a, b = b, a  # either order in tests.parquet
        rows.append({"test_id": t, "phase": str(rng.choice(["battery", "skeleton", "orientation"], p=[.2, .7, .1])),
                     "level": int(rng.integers(0, 3)), "var_a": a, "var_b": b, "given": "s0;s1" if t % 3 else "",
                     "statistic": float(rng.random()), "dof": 1, "pvalue": float(rng.random()) if t % 7 else np.nan,
                     "n": 100, "method": "g", "independent": bool(rng.random() < .5), "sparse": False,
                     "degenerate": False, "policy": "flag", "policy_applied": False})
    for a, b in pairs:  # each pair's last search test has the smallest p-value and an orientation test after it
        for phase in ("skeleton", "orientation"):
            rows.append({**rows[-1], "test_id": len(rows), "phase": phase, "var_a": a, "var_b": b, "pvalue": 0.0})
    tests = pd.DataFrame(rows)
    ev = pd.DataFrame({"var_a": [a for a, _ in pairs][:-1], "var_b": [b for _, b in pairs][:-1]})  # one pair absent
    assert tests.groupby(["var_a", "var_b"]).size().max() > TESTS_PER_PAIR
    whole = tests_data(ev, tests)
    table = pa.Table.from_pandas(tests, preserve_index=False)
    picked = tests_data(ev, shown_tests(table, ev))
    assert json.dumps(picked, sort_keys=False) == json.dumps(whole, sort_keys=False)
    import pyarrow.parquet as pq

    path = tmp_path / "tests.parquet"
    pq.write_table(table, path, row_group_size=100)  # several row groups: the picks cross batch bounds
    assert json.dumps(tests_data(ev, shown_tests(path, ev)), sort_keys=False) == json.dumps(whole, sort_keys=False)
    for rows in (7, 64, 333):  # candidates kept batch by batch: the same picks and counts
        for source in (table, path):
            picks = shown_tests(source, ev, batch_rows=rows)
            assert json.dumps(tests_data(ev, picks), sort_keys=False) == json.dumps(whole, sort_keys=False)


def test_shown_tests_in_one_pass_equal_the_frame_path_with_ties_and_many_thinnings():
    """The one-pass picker (tests dropped under their pair's bar, candidates thinned many times) gives
    the page exactly the lists and counts of the whole-frame path: p-values with many ties and NaN,
    orientation tests, pairs with few and with thousands of tests (property check, three seeds)."""
    import pyarrow as pa

    from pipeline.report._html import shown_tests, tests_data

    for seed in (1, 2, 3):
        rng = np.random.default_rng(seed)
        names = ["a", "b", "c", "d"]
        pairs = [(x, y) for i, x in enumerate(names) for y in names[i + 1:]]
        weights = np.array([0.5, 0.3, 0.15, 0.04, 0.01, 0.0])
        n = 6000
        which = rng.choice(len(pairs), size=n, p=weights / weights.sum())
        few = [*range(10, 20), n - 3, n - 2]  # a pair of 12 tests, all listed: two late ones side by side
        which[few] = 5
        p = np.round(rng.random(n), 2)  # many ties
        p[few] = 0.0  # at the bar its own earlier tests set
        p[rng.random(n) < 0.05] = np.nan
        phase = rng.choice(["skeleton", "orientation"], size=n, p=[.9, .1])
        phase[few] = "skeleton"
        tests = pd.DataFrame({
            "test_id": np.arange(n), "phase": phase,
            "level": rng.integers(0, 4, n), "var_a": [pairs[w][0] for w in which], "var_b": [pairs[w][1] for w in which],
            "given": "", "statistic": rng.random(n), "dof": 1, "pvalue": p, "n": 100, "method": "g",
            "independent": rng.random(n) < .5, "sparse": False, "degenerate": False, "policy": "flag",
            "policy_applied": False})
        ev = pd.DataFrame({"var_a": [x for x, _ in pairs], "var_b": [y for _, y in pairs]})
        whole = json.dumps(tests_data(ev, tests), sort_keys=False)
        table = pa.Table.from_pandas(tests, preserve_index=False)
        for rows in (5, 50, 500):
            assert json.dumps(tests_data(ev, shown_tests(table, ev, batch_rows=rows)), sort_keys=False) == whole
