"""Progress for people and for logs: bars on a terminal, one line per event otherwise."""

from __future__ import annotations

import json
import sys
import time
from typing import Any, TextIO

__all__ = ["Reporter", "STAGES"]

STAGES = ("ingest", "clean", "discretise", "battery", "skeleton", "report")


class Reporter:
    """Says what a run is doing: ``plain`` lines, ``json`` lines, or nothing (``quiet``).

    On an interactive terminal a bar follows the stages and another the tests of each search level
    (tqdm); elsewhere one line per stage and per level, so cron mail and journald stay readable.
    """

    def __init__(self, fmt: str = "plain", stream: TextIO | None = None, bars: bool | None = None) -> None:
        self.fmt = fmt
        self.stream = stream or sys.stderr
        self.bars = (self.stream.isatty() if bars is None else bars) and fmt == "plain"
        self._stage_bar: Any = None
        self._bar: Any = None

    def event(self, kind: str, **fields: Any) -> None:
        """Emit one event (stage start/end, level start, warning, ...)."""
        if self.fmt == "quiet":
            return
        if self.bars and kind == "stage":
            self._stage_progress(fields)
            return
        if self.fmt == "plain" and fields.get("status") == "start":
            return  # one line per stage: its end
        if self.fmt == "json":
            rec = {"time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "event": kind, **fields}
            self.stream.write(json.dumps(rec, default=str) + "\n")
        else:
            text = " ".join(f"{k}={v}" for k, v in fields.items())
            line = f"edgeproof: {kind} {text}".rstrip()
            if self.bars:
                from tqdm import tqdm

                tqdm.write(line, file=self.stream)
                return
            self.stream.write(line + "\n")
        self.stream.flush()

    def _stage_progress(self, fields: dict[str, Any]) -> None:
        from tqdm import tqdm

        if self._stage_bar is None:
            self._stage_bar = tqdm(total=len(STAGES), desc="stages", unit="stage", file=self.stream, position=0)
        name, status = fields.get("name"), fields.get("status")
        if status == "start":
            self._stage_bar.set_description(f"stage {name}")
        else:
            if name in STAGES:
                self._stage_bar.update(1)
            if name == STAGES[-1]:
                self._stage_bar.close()
                self._stage_bar = None

    def level(self, level: int, pairs: int) -> None:
        """A search level starts with `pairs` pairs to test."""
        if self.fmt == "quiet":
            return
        if self.bars:
            from tqdm import tqdm

            self.close()
            self._bar = tqdm(total=pairs, desc=f"search level {level}", unit="pair", file=self.stream, position=1, leave=False)
        else:
            self.event("level", level=level, pairs=pairs)

    def advance(self, pairs: int) -> None:
        """`pairs` more pairs of the current level are decided."""
        if self._bar is not None:
            self._bar.update(pairs)

    def close(self) -> None:
        """Close an open level bar."""
        if self._bar is not None:
            self._bar.close()
            self._bar = None
