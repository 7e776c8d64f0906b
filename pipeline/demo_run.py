"""`edgeproof demo`: write the invented scenario's snapshots, run the nightly job over them, and
compare the night before the planted change with the night of it."""

from __future__ import annotations

from pathlib import Path
from typing import Sequence

from .config import load_config
from .progress import Reporter
from .runs import output_root, safe_name

__all__ = ["demo_main"]


def demo_main(data_dir: str, config_path: str, overrides: Sequence[str], reporter: Reporter | None = None) -> int:
    """Generate the demo into `data_dir`, process every snapshot, then print what changed."""
    from .compare import compare_main
    from .demo import generate
    from .nightly import nightly_main

    scenario = generate(data_dir)
    sets = [f"nightly.inbox={scenario.inbox}", f"report.truth_file={scenario.truth_path}", "nightly.settle_seconds=0", *overrides]
    cfg = load_config(config_path, sets)
    code = nightly_main(cfg, Path(config_path), log=reporter or Reporter("plain"))
    if code != 0:
        return code
    root = output_root(cfg, config_path)
    names = [safe_name(p.stem if p.is_file() else p.name) for p in scenario.snapshots]
    changed = names.index(safe_name(Path(scenario.changed_snapshot_name).stem))
    before, after = root / names[changed - 1], root / names[changed]
    print(f"\nThe planted change is {scenario.changed_edge[0]} - {scenario.changed_edge[1]} on {names[changed]}; comparing {before.name} with {after.name}:")
    compare_main(str(before), str(after), cfg=cfg, config_path=Path(config_path), json_out=False, fail_on_change=None, out_dir=None)
    print(f"\nReports: {root}/<night>/report.html (latest: {root / 'latest' / 'report.html'})")
    return 0
