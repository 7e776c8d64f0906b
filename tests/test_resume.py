"""Resuming: a search picked up from its last finished level gives what an uninterrupted one gives."""

from __future__ import annotations

import io
import json
import shutil

import numpy as np
import pandas as pd
import pyarrow.compute as pc
import pyarrow.parquet as pq
from _shared import benchmark_codes

from pipeline.independence import EngineSettings
from pipeline.independence.columns import TestColumns
from pipeline.search import Knowledge
from pipeline.stages import battery, skeleton
from pipeline.stages.skeleton import state_doc, state_from


def _child():
    return benchmark_codes("child")


def test_resume_from_each_level_checkpoint_matches_uninterrupted(tmp_path):
    """For every level of the CHILD search, resuming from the checkpoint written after it gives the
    same tests and evidence as the uninterrupted search (published benchmark data, G-test)."""
    codes, names, cards = _child()
    settings = EngineSettings(method="g")
    know = Knowledge()
    marginal = battery.run(codes, names, cards, settings, know)
    full = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None, checkpoint=tmp_path / "full")
    saved = []
    # the checkpoint after every level: a search stopped there (max_order) leaves exactly that checkpoint
    for level in range(2, full.skeleton.levels):  # the marginal state itself is the level-1 start
        folder = tmp_path / f"cp{level}"
        part = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=level - 1, checkpoint=folder)
        assert part.skeleton.levels <= level
        doc = json.loads((folder / "state.json").read_text())
        assert doc["level"] == level and len(doc["parts"]) == level - 1  # one Parquet part per level run
        saved.append(folder)
    assert len(saved) >= 3
    for i, folder in enumerate(saved):
        copy = tmp_path / f"resume{i}"
        shutil.copytree(folder, copy)
        resumed = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None, checkpoint=copy)
        assert resumed.tests == full.tests  # the bytes of tests.parquet
        assert resumed.evidence.equals(full.evidence)
    # the checkpoint is really what the resumed search starts from: a mark put into the first test of
    # the level-1 part comes back in the tests table (a recomputed search would not have it)
    copy = tmp_path / "marked"
    shutil.copytree(saved[-1], copy)
    table = pq.read_table(copy / "level-0001.parquet")
    perms = table.column("permutations").to_pylist()
    perms[0] = 12345
    pq.write_table(table.set_column(table.schema.get_field_index("permutations"), "permutations",
                                    pc.cast(np.array(perms), "int64")), copy / "level-0001.parquet")
    resumed = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None, checkpoint=copy)
    back, whole = pd.read_parquet(io.BytesIO(resumed.tests)), pd.read_parquet(io.BytesIO(full.tests))
    assert back["permutations"].iloc[len(marginal.tests)] == 12345
    assert len(back) == len(whole)


def test_state_round_trips_through_its_document_and_part():
    """A search state written as plain data plus a Parquet part of its tests reads back equal (the
    checkpoint holds nothing executable)."""
    codes, names, cards = _child()
    marginal = battery.run(codes, names, cards, EngineSettings(), Knowledge())
    doc = json.loads(json.dumps(state_doc(marginal.state)))
    back = state_from(doc, TestColumns.from_arrow(marginal.state.tests.columns().to_arrow()))
    assert back.edges == marginal.state.edges and back.level == marginal.state.level
    assert back.tests.columns().results(names) == marginal.state.tests.columns().results(names)


def test_failed_checkpoint_write_stops_the_search_and_names_no_later_part(tmp_path, monkeypatch):
    """Checkpoints are written on a thread while the next level runs: when the write after level 2 of the
    CHILD search fails, the stage raises that error, and the state on disk still names only complete parts
    (level 1), with nothing of a later level written; resuming from it gives the uninterrupted tests."""
    import pytest

    codes, names, cards = _child()
    settings = EngineSettings(method="g")
    know = Knowledge()
    marginal = battery.run(codes, names, cards, settings, know)
    full = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None)
    real = skeleton._write_level

    def failing(folder, level):
        if level.stem == "level-0002":
            raise OSError(28, "No space left on device")
        real(folder, level)

    monkeypatch.setattr(skeleton, "_write_level", failing)
    folder = tmp_path / "cp"
    with pytest.raises(OSError, match="No space left"):
        skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None, checkpoint=folder)
    doc = json.loads((folder / "state.json").read_text())
    assert doc["parts"] == ["level-0001.parquet"]
    assert sorted(p.name for p in folder.iterdir()) == ["level-0001.json", "level-0001.parquet", "state.json"]
    monkeypatch.setattr(skeleton, "_write_level", real)
    resumed = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None, checkpoint=folder)
    assert resumed.tests == full.tests
    assert resumed.skeleton.edges == full.skeleton.edges


def test_quick_levels_fold_into_the_next_checkpoint_and_resume_the_same(tmp_path, monkeypatch):
    """With `checkpoint_every`, a level is saved only once that many seconds have passed since the last
    save: the levels in between go into the next part (a clock that ticks one second per reading makes
    every other level due), and resuming from such a checkpoint gives the uninterrupted tests. A search
    quicker than `checkpoint_every` writes no checkpoint and gives the same tests (CHILD, published data)."""
    import types

    codes, names, cards = _child()
    settings = EngineSettings(method="g")
    know = Knowledge()
    marginal = battery.run(codes, names, cards, settings, know)
    full = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None)
    quick = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None,
                         checkpoint=tmp_path / "quick", checkpoint_every=3600.0)
    assert quick.tests == full.tests and list((tmp_path / "quick").iterdir()) == []
    ticks = iter(range(1, 10_000))
    monkeypatch.setattr(skeleton, "time", types.SimpleNamespace(perf_counter=lambda: float(next(ticks))))
    folded = tmp_path / "folded"
    run = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=3,
                       checkpoint=folded, checkpoint_every=1.5)
    monkeypatch.undo()
    doc = json.loads((folded / "state.json").read_text())
    levels = run.skeleton.levels - 1  # the levels this search ran after the marginal state
    assert 1 <= len(doc["parts"]) < levels, (doc["parts"], levels)
    n_parts = sum(pq.read_metadata(folded / p).num_rows for p in doc["parts"])
    assert n_parts + len(marginal.tests) == doc["n_tests"]  # the skipped levels' tests are in the parts
    resumed = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None, checkpoint=folded)
    assert resumed.tests == full.tests
    assert resumed.evidence.equals(full.evidence)
