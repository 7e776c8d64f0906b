"""Resuming: a search picked up from its last finished level gives what an uninterrupted one gives."""

from __future__ import annotations

import json

import numpy as np
from _shared import benchmark_path

from pipeline.independence import EngineSettings
from pipeline.search import Knowledge
from pipeline.stages import battery, skeleton
from pipeline.stages.skeleton import state_from_json, state_to_json


def _child():
    path = benchmark_path("child") / "data.txt"
    names = path.read_text().splitlines()[0].split()
    raw = np.loadtxt(path, skiprows=1)
    codes = np.vstack([np.unique(raw[:, j], return_inverse=True)[1] for j in range(raw.shape[1])]).astype(np.int8)
    return codes, names, [int(c.max()) + 1 for c in codes]


def test_resume_from_each_level_checkpoint_matches_uninterrupted(tmp_path):
    """For every level of the CHILD search, resuming from the checkpoint written after it gives the
    same tests and evidence as the uninterrupted search (published benchmark data, G-test)."""
    codes, names, cards = _child()
    settings = EngineSettings(method="g")
    know = Knowledge()
    marginal = battery.run(codes, names, cards, settings, know)
    saved: list[str] = []
    full = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None,
                        checkpoint=tmp_path / "full.json")
    # capture the state after every level by replaying with a checkpoint per level
    for level in range(2, full.skeleton.levels):  # the marginal state itself is the level-1 start
        part = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=level - 1,
                            checkpoint=tmp_path / f"cp{level}.json")
        assert part.skeleton.levels <= level
        saved.append((tmp_path / f"cp{level}.json").read_text())  # a level that ran wrote its checkpoint
    assert len(saved) >= 3
    for i, text in enumerate(saved):
        assert state_from_json(text).level == i + 2
        cp = tmp_path / f"resume{i}.json"
        cp.write_text(text)
        resumed = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None, checkpoint=cp)
        assert resumed.tests.equals(full.tests)
        assert resumed.evidence.equals(full.evidence)
    # the checkpoint is really what the resumed search starts from: a mark put into the first
    # recorded test comes back in the tests table (a recomputed search would not have it)
    marked = json.loads(saved[-1])
    marked["tests"][0][1]["permutations"] = 12345
    cp = tmp_path / "marked.json"
    cp.write_text(json.dumps(marked))
    resumed = skeleton.run(codes, names, cards, settings, know, marginal.state, max_order=None, checkpoint=cp)
    assert resumed.tests["permutations"].iloc[0] == 12345
    assert len(resumed.tests) == len(full.tests)


def test_state_round_trips_through_json():
    """A search state written to JSON reads back equal (the checkpoint holds nothing executable)."""
    codes, names, cards = _child()
    marginal = battery.run(codes, names, cards, EngineSettings(), Knowledge())
    back = state_from_json(state_to_json(marginal.state))
    assert back.edges == marginal.state.edges and back.level == marginal.state.level
    assert [t.result for t in back.tests] == [t.result for t in marginal.state.tests]
