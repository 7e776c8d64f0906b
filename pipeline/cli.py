"""The `edgeproof` command line: a thin layer over `pipeline.api`.

Every failure prints one line naming the problem and the fix and exits non-zero
(2 usage or configuration, 3 data, 4 lock held, 5 limit exceeded, 6 graph changed, 1 anything else);
``--debug`` adds the traceback.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import traceback
from pathlib import Path
from typing import NoReturn, Sequence

from . import __version__
from .errors import EXIT_FAILURE, EXIT_USAGE, ConfigError, EdgeproofError

__all__ = ["main", "build_parser"]


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:  # type: ignore[override]  # one line, exit code 2
        raise ConfigError(f"{message}; see `edgeproof {self.prog.split()[-1]} --help`." if " " in self.prog else f"{message}; see `edgeproof --help`.")


def _common(p: argparse.ArgumentParser, config_required: bool = False) -> None:
    p.add_argument("--config", required=config_required, help="YAML configuration file")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override one configuration key, e.g. --set test.alpha=0.01 (repeatable)")
    p.add_argument("--debug", action="store_true", help="show the traceback of a failure")
    p.add_argument("--log-format", choices=["plain", "json"], default="plain", help="progress lines as text or JSON lines")
    p.add_argument("--quiet", action="store_true", help="no progress lines")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every subcommand."""
    parser = _Parser(prog="edgeproof", description="Which operational signals are directly linked, night after night.")
    parser.add_argument("--version", action="version", version=f"edgeproof {__version__}",
                        help="print the version and exit")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser, title="commands", metavar="COMMAND")

    p = sub.add_parser("run", help="run every stage on one extract",
                       description="Run every stage on one extract: one row per time window and node, one column "
                                   "per signal. Writes a run folder with report.html and evidence.csv.")
    _common(p)
    p.add_argument("--input", required=True, help="a file (CSV, Parquet, JSON lines), a glob or a folder of partitions")
    p.add_argument("--out", help="run folder to write (default: a new folder under the output root)")

    p = sub.add_parser("probe", help="one test on demand: are X and Y dependent given a set of signals?",
                       description="One test on demand through the same data stages as a run; prints the "
                                   "outcome in plain words with the alpha it used.")
    _common(p)
    p.add_argument("--input", required=True, help="the extract to test on (as for `run`)")
    p.add_argument("x", help="the first signal (a column name)")
    p.add_argument("y", help="the second signal (a column name)")
    p.add_argument("--given", default="", help="comma-separated conditioning set (signals held fixed)")
    p.add_argument("--method", choices=["auto", "g", "chi2", "permutation", "gcm"],
                   help="auto: G-test for categories on independent rows, gcm otherwise; g: G-test; chi2: Pearson "
                        "chi-square; permutation: G with permuted rows; gcm: residual covariance (default: test.method)")
    p.add_argument("--json", action="store_true", help="print the result as JSON instead of sentences")

    p = sub.add_parser("nightly", help="process every snapshot in the inbox that has no successful run yet",
                       description="Process every snapshot in nightly.inbox that has no successful run yet, "
                                   "then move the `latest` and `previous` pointers. Safe to start every hour.")
    _common(p, config_required=True)

    p = sub.add_parser("compare", help="what changed between two runs",
                       description="What changed between two runs: links added, removed, kept and turned, "
                                   "with the evidence before and after.")
    _common(p)
    p.add_argument("run_a", help="the earlier run: a run folder, or `previous` with --config")
    p.add_argument("run_b", help="the later run: a run folder, or `latest` with --config")
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.add_argument("--fail-on-change", type=int, default=None, metavar="N", help="exit 6 when more than N edges changed")
    p.add_argument("--out", help="folder for diff.parquet, diff.csv, diff.svg, diff.html")

    p = sub.add_parser("history", help="every link over the last nights",
                       description="Every link over the last nights: on which nights it was linked, its p-value "
                                   "and effect per night. Writes history.csv and history.html.")
    _common(p, config_required=True)
    p.add_argument("--last", type=int, default=None, metavar="N", help="show only the N most recent runs")
    p.add_argument("--out", help="folder for history.html and history.csv")

    p = sub.add_parser("demo", help="generate the invented demo scenario and run the nightly pipeline on it",
                       description="Generate the invented demo scenario (four nights of an online service with a "
                                   "known graph), run the nightly pipeline on it, and compare two nights.")
    _common(p)
    p.add_argument("--data", default="outputs/demo", help="where the demo snapshots are written")
    return parser


def _load(args: argparse.Namespace):
    from .config import load_config

    return load_config(args.config, args.overrides)


def _reporter(args: argparse.Namespace):
    from .progress import Reporter

    return Reporter("quiet" if args.quiet else args.log_format)


def _cmd_run(args: argparse.Namespace) -> int:
    from .api import run_pipeline
    from .runs import check_outside_nightly_root

    cfg = _load(args)
    if args.out:
        check_outside_nightly_root(Path(args.out), cfg, args.config)
    res = run_pipeline(cfg, args.input, args.out, config_path=args.config, reporter=_reporter(args))
    linked = int(res.evidence["linked"].sum())
    print(f"{res.out_dir}: {linked} linked pairs of {len(res.evidence)}; report {res.out_dir / 'report.html'}")
    return 0


def _cmd_probe(args: argparse.Namespace) -> int:
    from .probe import probe

    cfg = _load(args)
    if args.method:
        cfg.test.method = args.method
    given = [g.strip() for g in args.given.split(",") if g.strip()]
    result = probe(cfg, args.input, args.x, args.y, given)
    if args.json:
        print(json.dumps(result, sort_keys=True, default=str))
    else:
        from .probe import plain_words

        print(plain_words(result))
    return 0


def _cmd_nightly(args: argparse.Namespace) -> int:
    from .nightly import nightly_main

    cfg = _load(args)
    return int(nightly_main(cfg, Path(args.config), log=_reporter(args)))


def _cmd_compare(args: argparse.Namespace) -> int:
    from .compare import compare_main

    cfg = _load(args) if args.config else None
    return int(compare_main(args.run_a, args.run_b, cfg=cfg, config_path=Path(args.config) if args.config else None,
                            json_out=args.json, fail_on_change=args.fail_on_change, out_dir=args.out))


def _cmd_history(args: argparse.Namespace) -> int:
    from .history import history_main

    cfg = _load(args)
    return int(history_main(cfg, Path(args.config), last=args.last, out_dir=args.out))


def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo_run import demo_main

    return int(demo_main(args.data, args.config or "configs/demo.yaml", args.overrides, reporter=_reporter(args)))


_COMMANDS = {"run": _cmd_run, "probe": _cmd_probe, "nightly": _cmd_nightly, "compare": _cmd_compare,
             "history": _cmd_history, "demo": _cmd_demo}


def program() -> int:
    """The `edgeproof` program (`python -m pipeline` and the installed command): `main` on the command
    line, then the collector's view of the heap is frozen before the interpreter ends.

    An ending interpreter clears every module and collects between the steps, rescanning the whole
    heap that a run leaves (pandas, numba, scipy and the run's tables): about 1 s after a 70-signal
    run, where freezing first takes 0.07 s (measured at exit). Nothing is skipped by it: every file
    is written, flushed and closed by then, the standard streams are flushed by the interpreter, and
    exit handlers (worker pools, temporary folders) still run. Calls of `main` from Python (the
    tests) leave the collector as it was.

    Arrow's buffers come from the C library's allocator unless ``ARROW_DEFAULT_MEMORY_POOL`` says
    otherwise (read when pyarrow is first used, so it is set before any command imports it). Its default
    allocator was slower on the first large read of a process: ingest of the 1,000,000 x 40 extract of
    `bench/gen_extract.py` took 2.19-2.85 s with it and 1.48-2.24 s with the C library's, four
    interleaved fresh processes each (clean 1.06-1.54 s and 1.17-1.24 s)."""
    os.environ.setdefault("ARROW_DEFAULT_MEMORY_POOL", "system")
    code = main()
    import gc

    sys.stdout.flush()
    sys.stderr.flush()
    gc.freeze()
    return code


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the `edgeproof` command; returns the exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    try:
        args = build_parser().parse_args(argv)
        if not args.command:
            build_parser().print_help()
            return EXIT_USAGE
        return _COMMANDS[args.command](args)
    except EdgeproofError as err:
        if debug:
            traceback.print_exc()
        print(f"edgeproof: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print("edgeproof: interrupted; the last finished run is untouched.", file=sys.stderr)
        return 130
    except Exception as err:  # noqa: BLE001 - one line unless --debug
        if debug:
            traceback.print_exc()
        first = str(err).splitlines()[0] if str(err) else ""
        print(f"edgeproof: internal error: {type(err).__name__}: {first} (rerun with --debug for the traceback)", file=sys.stderr)
        return EXIT_FAILURE
