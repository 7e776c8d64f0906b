"""Progress for people and for logs: bars on a terminal, one line per event otherwise."""

from __future__ import annotations

import json
import sys
import time
from typing import Any, TextIO

__all__ = ["Reporter"]


class Reporter:
    """Says what a run is doing: ``plain`` lines, ``json`` lines, or nothing (``quiet``).

    On an interactive terminal each search level gets a progress bar (tqdm); elsewhere one line per
    stage and per level, so cron mail and journald stay readable.
    """

    def __init__(self, fmt: str = "plain", stream: TextIO | None = None, bars: bool | None = None) -> None:
        self.fmt = fmt
        self.stream = stream or sys.stderr
        self.bars = self.stream.isatty() if bars is None else bars
        self._bar: Any = None

    def event(self, kind: str, **fields: Any) -> None:
        """Emit one event (stage start/end, level start, warning, ...)."""
        if self.fmt == "quiet":
            return
        if self.fmt == "plain" and fields.get("status") == "start":
            return  # one line per stage: its end
        if self.fmt == "json":
            rec = {"time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "event": kind, **fields}
            self.stream.write(json.dumps(rec, default=str) + "\n")
        else:
            text = " ".join(f"{k}={v}" for k, v in fields.items())
            self.stream.write(f"edgeproof: {kind} {text}".rstrip() + "\n")
        self.stream.flush()

    def level(self, level: int, pairs: int) -> None:
        """A search level starts with `pairs` pairs to test."""
        if self.bars and self.fmt == "plain":
            from tqdm import tqdm

            self.close()
            self._bar = tqdm(total=1, desc=f"search level {level} ({pairs} pairs)", file=self.stream, leave=False)
        else:
            self.event("level", level=level, pairs=pairs)

    def close(self) -> None:
        """Close an open progress bar."""
        if self._bar is not None:
            self._bar.update(1)
            self._bar.close()
            self._bar = None
