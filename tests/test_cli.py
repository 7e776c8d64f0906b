"""The command line: the run on a published benchmark, exit codes and one-line messages."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
from _shared import REPO, benchmark_path, reference_skeleton

from pipeline.cli import main

REFERENCE_ARGS = [
    "--set", "discretise.default=categorical", "--set", "test.method=chi2", "--set", "test.alpha=0.05",
    "--set", "search.max_order=none", "--set", "test.sparse_policy=flag",
]


def _error_lines(err: str) -> list[str]:
    """The failure lines of stderr (progress lines aside); a traceback would show up here too."""
    return [line for line in err.strip().splitlines() if "error" in line.lower() or "Traceback" in line]


def _adjacency(evidence: pd.DataFrame, names: list[str]) -> np.ndarray:
    idx = {n: i for i, n in enumerate(names)}
    adj = np.zeros((len(names), len(names)), dtype=bool)
    for a, b in evidence.loc[evidence["linked"], ["var_a", "var_b"]].itertuples(index=False):
        adj[idx[a], idx[b]] = adj[idx[b], idx[a]] = True
    return adj


def test_alarm_run_gives_the_reference_skeleton(tmp_path, capsys):
    """`edgeproof run` on ALARM gives exactly causal-learn's published PC-stable chi-square skeleton."""
    # Reference: tests/data/benchmarks/alarm/reference_pc_chisq_0.05_stable.txt, causal-learn 0.1.4.8
    # pc(data, 0.05, "chisq", stable=True) on the same 10,000 rows.
    data = benchmark_path("alarm") / "data.txt"
    code = main(["run", "--input", str(data), "--out", str(tmp_path / "run"), "--quiet", *REFERENCE_ARGS])
    assert code == 0
    names = data.read_text().splitlines()[0].split()
    evidence = pd.read_parquet(tmp_path / "run" / "evidence.parquet")
    assert len(evidence) == len(names) * (len(names) - 1) // 2
    np.testing.assert_array_equal(_adjacency(evidence, names), reference_skeleton("alarm"))
    for name in ["evidence.parquet", "evidence.csv", "tests.parquet", "graph.dot", "graph.svg", "report.html", "manifest.json"]:
        assert (tmp_path / "run" / name).is_file(), name
    for col in ["var_a", "var_b", "linked", "pvalue", "statistic", "dof", "given", "n"]:
        assert col in evidence.columns
    assert "linked pairs" in capsys.readouterr().out


def test_second_run_reuses_every_stage_and_a_discretise_change_recomputes(tmp_path):
    """The stage cache: the same input and configuration recompute nothing; a new bin count recomputes from discretise."""
    data = benchmark_path("asia") / "data.txt"
    assert main(["run", "--input", str(data), "--out", str(tmp_path / "a"), "--quiet"]) == 0
    assert main(["run", "--input", str(data), "--out", str(tmp_path / "b"), "--quiet"]) == 0
    stages = json.loads((tmp_path / "b" / "manifest.json").read_text())["stages"]
    assert all(stages[s]["reused"] for s in ["ingest", "clean", "discretise", "battery", "skeleton"])
    assert (tmp_path / "a" / "evidence.parquet").read_bytes() == (tmp_path / "b" / "evidence.parquet").read_bytes()
    assert main(["run", "--input", str(data), "--out", str(tmp_path / "c"), "--quiet", "--set", "discretise.default=categorical", "--set", "test.alpha=0.01"]) == 0
    stages = json.loads((tmp_path / "c" / "manifest.json").read_text())["stages"]
    assert stages["clean"]["reused"] and not stages["discretise"]["reused"] and not stages["battery"]["reused"]


def test_bad_configuration_key_exits_2_with_one_line(tmp_path, capsys):
    """A misspelt key exits 2 and says which key, in one line."""
    data = benchmark_path("asia") / "data.txt"
    code = main(["run", "--input", str(data), "--out", str(tmp_path / "r"), "--set", "test.alpah=0.1"])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert len(_error_lines(err)) == 1 and "test.alpah" in err
    assert not (tmp_path / "r").exists()


def test_missing_input_exits_3(tmp_path, capsys):
    """A missing input file exits 3 and names the path."""
    code = main(["run", "--input", str(tmp_path / "nope.csv"), "--out", str(tmp_path / "r")])
    err = capsys.readouterr().err.strip()
    assert code == 3 and "nope.csv" in err and len(_error_lines(err)) == 1


def test_empty_input_exits_3(tmp_path, capsys):
    """An empty input file exits 3 with one line and writes no run folder."""
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    code = main(["run", "--input", str(empty), "--out", str(tmp_path / "r")])
    err = capsys.readouterr().err.strip()
    assert code == 3 and "empty.csv" in err and len(_error_lines(err)) == 1
    assert not (tmp_path / "r").exists()


def test_unknown_option_exits_2(capsys):
    """An unknown option is a usage error (exit 2), in one line."""
    assert main(["run", "--input", "x", "--bogus"]) == 2
    assert len(_error_lines(capsys.readouterr().err)) == 1


def test_probe_json_reports_the_test(capsys):
    """`edgeproof probe --json` prints statistic, dof, pvalue and n of one test."""
    data = benchmark_path("asia") / "data.txt"
    names = data.read_text().splitlines()[0].split()
    code = main(["probe", "--input", str(data), names[0], names[1], "--given", names[2], "--json", "--set", "discretise.default=categorical"])
    assert code == 0
    out = json.loads(capsys.readouterr().out)
    for key in ("statistic", "dof", "pvalue", "n"):
        assert key in out
    assert out["n"] == 10000 and 0 < out["pvalue"] <= 1


def test_module_entry_point_runs():
    """`python -m pipeline --version` works like the console script."""
    out = subprocess.run([sys.executable, "-m", "pipeline", "--version"], capture_output=True, text=True, cwd=REPO, check=True)
    assert out.stdout.startswith("edgeproof ")


def test_missing_graphviz_says_how_to_install_it(tmp_path, capsys, monkeypatch):
    """Without Graphviz's `dot` on the PATH the run fails in one line that says how to install it,
    and no run folder is published."""
    data = benchmark_path("asia") / "data.txt"
    monkeypatch.setenv("PATH", str(tmp_path / "empty-path"))
    code = main(["run", "--input", str(data), "--out", str(tmp_path / "r"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 1 and "apt-get install graphviz" in err and len(_error_lines(err)) == 1
    assert not (tmp_path / "r").exists()


def test_unreachable_dask_scheduler_is_a_configuration_error(tmp_path, capsys):
    """A dask scheduler address where nothing listens exits 2 naming the address."""
    data = benchmark_path("asia") / "data.txt"
    code = main(["run", "--input", str(data), "--out", str(tmp_path / "r"), "--quiet",
                 "--set", "parallel.backend=dask", "--set", "parallel.scheduler=tcp://127.0.0.1:9"])
    err = capsys.readouterr().err
    assert code == 2 and "tcp://127.0.0.1:9" in err and len(_error_lines(err)) == 1


def test_json_log_lines_when_not_a_terminal(tmp_path, capsys):
    """`--log-format json` gives one JSON object per line: every stage's end and every search level."""
    data = benchmark_path("asia") / "data.txt"
    assert main(["run", "--input", str(data), "--out", str(tmp_path / "r"), "--log-format", "json"]) == 0
    lines = [json.loads(line) for line in capsys.readouterr().err.strip().splitlines()]
    done = {rec["name"] for rec in lines if rec["event"] == "stage" and rec.get("status") in ("done", "reused")}
    assert {"ingest", "clean", "discretise", "battery", "skeleton", "report"} <= done
    assert any(rec["event"] == "level" for rec in lines)


def test_probe_prints_plain_words_with_alpha(capsys):
    """`edgeproof probe` without --json prints a sentence with the outcome and the alpha it used (ASIA data)."""
    data = benchmark_path("asia") / "data.txt"
    names = data.read_text().splitlines()[0].split()
    code = main(["probe", "--input", str(data), names[0], names[1], "--set", "discretise.default=categorical",
                 "--set", "test.alpha=0.01"])
    assert code == 0
    out = capsys.readouterr().out
    first = out.splitlines()[0]
    assert first.startswith(f"{names[0]} and {names[1]}: ") and "alpha = 0.01" in first
    assert ("dependent given no conditioning set" in first) or ("no evidence of dependence" in first)
    assert "independent" not in out and "rows" in out


def test_every_command_and_option_has_help():
    """Every subcommand, option and argument of `edgeproof --help` carries a line of text."""
    import argparse

    from pipeline.cli import build_parser

    parser = build_parser()
    subs = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    helps = {c.dest: c.help for c in subs._choices_actions}
    assert set(helps) == set(subs.choices) and all(helps.values())
    for name, sub in [("edgeproof", parser), *subs.choices.items()]:
        for action in sub._actions:
            if isinstance(action, argparse._SubParsersAction):
                continue
            assert action.help and action.help != argparse.SUPPRESS, f"{name} {action.option_strings or action.dest}"
        assert name == "edgeproof" or sub.description, name
