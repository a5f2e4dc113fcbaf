"""The typed search state (search.fit.state): checkpoints keep the layout of version 3, states
checkpointed before the state was typed resume to the uninterrupted filterbank, and any other
format, version or a damaged field is refused with a ValueError naming it.

The fixture ``tests/fixtures/search_state_v3.pickle`` holds four checkpoints of one fit of
:func:`corpus` with ``SETTINGS``, pickled by the code of state version 3 as it was before
``SearchState`` existed (the fit's checkpoints 0, 2, 5 and 7: after the spectrogram baseline,
after the first family round, after the first refinement coordinate, and after the last
coordinate with a step applied). The contract checked is docs/design.md §5.5: a resumed fit
ends with exactly the filterbank of an uninterrupted run, and another state version is refused
with a ValueError (on which the service's worker starts the job over).
"""
import copy
import pickle
from pathlib import Path

import numpy as np
import pytest

from burstlens.search.corpus import Corpus
from burstlens.search.diagnostics import ConvergenceLog
from burstlens.search.fit.state import STATE_VERSION, SearchState
from burstlens.search.optimize import FilterbankSearch

FIXTURE = Path(__file__).parents[2] / "fixtures" / "search_state_v3.pickle"
FS, N = 1000.0, 256
SETTINGS = dict(channels=8, band_hz=[120.0, 360.0], evaluations=8, subset=6, bootstrap=0,
                batch=4, refine_maxiter=3, seed=4)
# the fixture's checkpoints, by the index of the checkpoint call in the fit that made them
CAPTURED = {"baselines": 0, "family": 2, "refine": 5, "refine_stepped": 7}


def corpus():
    """Ten windows: a short 150 Hz atom and a long chirp up from 300 Hz, in white noise."""
    rng = np.random.default_rng(7)
    t = np.arange(N) / FS - N / (2 * FS)
    shift = rng.uniform(-0.02, 0.02, (10, 1))
    phase = rng.uniform(0, 2 * np.pi, (10, 1))
    u = t - shift
    windows = (np.exp(-u ** 2 / (4 * 0.004 ** 2)) * np.cos(2 * np.pi * 150.0 * u + phase)
               + np.exp(-u ** 2 / (4 * 0.03 ** 2)) * np.cos(2 * np.pi * (300.0 * u + 1000.0 * u ** 2)))
    windows += 0.05 * rng.standard_normal(windows.shape)
    meta = [{"file": "generated", "trace_id": "XX.GEN..HHZ", "start": None, "offset_s": 0.6 * i}
            for i in range(len(windows))]
    return Corpus(windows, FS, meta, [], [], {}, "state-fixture")


@pytest.fixture(scope="module")
def todays():
    """The version-3 checkpoints pickled by the code before the typed state."""
    with FIXTURE.open("rb") as f:
        return pickle.load(f)   # the project's own test fixture


@pytest.fixture(scope="module")
def whole():
    """An uninterrupted fit with this code, and the checkpoints it handed out (pickled)."""
    states = []
    search = FilterbankSearch(**SETTINGS).fit(corpus(), checkpoint=lambda s: states.append(
        pickle.dumps(s)))
    return search, [pickle.loads(s) for s in states]


def same_layout(a, b, where="state", values=True):
    """Assert that ``a`` and ``b`` have the same layout: dict keys in the same order, the same
    types all the way down, and (``values``) the same values; other objects (the Optimizer,
    the log) must be the very same object when ``values``."""
    assert type(a) is type(b), f"{where}: {type(a).__name__} != {type(b).__name__}"
    if isinstance(a, dict):
        assert list(a) == list(b), f"{where}: keys {list(a)} != {list(b)}"
        for k in a:
            same_layout(a[k], b[k], f"{where}.{k}", values)
    elif isinstance(a, list):
        assert len(a) == len(b), f"{where}: length {len(a)} != {len(b)}"
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            same_layout(x, y, f"{where}[{i}]", values)
    elif isinstance(a, np.ndarray):
        assert a.dtype == b.dtype and a.shape == b.shape, where
        assert not values or np.array_equal(a, b), where
    elif isinstance(a, (int, float, str, type(None))):
        assert not values or a == b, f"{where}: {a!r} != {b!r}"
    else:
        assert not values or a is b, f"{where}: not the same object"


def test_todays_checkpoints_resume_to_the_uninterrupted_filterbank(todays, whole):
    """Each checkpoint of the version-3 code (mid-baselines, mid-family with the pickled
    Optimizer, mid-refinement, last refinement coordinate) read by ``SearchState.from_dict``
    ends with exactly the filterbank, held-out result and evaluation count of an uninterrupted
    run of this code (docs/design.md §5.5)."""
    search, _ = whole
    assert set(todays) == set(CAPTURED)
    for name, state in todays.items():
        resumed = FilterbankSearch(**SETTINGS).fit(corpus(), resume_from=copy.deepcopy(state))
        assert resumed.filterbank_ == search.filterbank_, name
        assert resumed.diagnostics_["result"] == search.diagnostics_["result"], name
        assert resumed.diagnostics_["refinement"] == search.diagnostics_["refinement"], name
        assert len(resumed.diagnostics_["evaluations"]) == len(search.diagnostics_["evaluations"])


def test_reading_and_writing_a_checkpoint_gives_back_the_version_3_layout(todays, whole):
    """``from_dict`` then ``to_dict`` gives back each of today's checkpoints key for key (the
    optional ``seconds`` and ``steps`` absent where they were), sharing the Optimizer and log;
    and the checkpoints this code hands out have the same layout, phase and round as today's
    at the same point of the same fit, so the code of version 3 reads them too."""
    _, states = whole
    for name, state in todays.items():
        typed = SearchState.from_dict(state)
        same_layout(typed.to_dict(), state, name)
        fresh = states[CAPTURED[name]]
        same_layout(fresh, state, name, values=False)
        assert (fresh["phase"], fresh["round"], fresh["subset"]) == \
            (state["phase"], state["round"], state["subset"])
    assert "seconds" not in todays["baselines"] and "steps" not in todays["refine"]["refine"]
    assert todays["refine_stepped"]["refine"]["steps"]


def test_the_stages_state_is_typed(todays):
    """The typed state carries the phases' records as attributes: the baselines' fits, the
    family search with its Optimizer, the refinement with channel records keyed by channel
    number (the checkpoint's keys are their strings)."""
    typed = SearchState.from_dict(todays["refine_stepped"])
    assert typed.phase == "refine" and isinstance(typed.log, ConvergenceLog)
    assert typed.baselines.spectrogram_time_spread_s == \
        todays["refine_stepped"]["baselines"]["spectrogram"]["parameters"]["time_spread_s"]
    assert typed.family.optimizer is todays["refine_stepped"]["family"]["optimizer"]
    assert sorted(typed.refine.records) == list(range(SETTINGS["channels"]))
    assert typed.refine.steps[0].coordinate == \
        todays["refine_stepped"]["refine"]["steps"][0]["coordinate"]


@pytest.mark.parametrize("version", [STATE_VERSION - 1, STATE_VERSION + 1, None])
def test_another_state_version_is_refused_naming_both(todays, version):
    """An older or newer state (or one without a version) is refused before anything is read,
    with a ValueError naming its version and the one this code reads; ``fit`` passes it on,
    which is what makes the worker start the job over (DEVELOPERS.md, the worker contract)."""
    other = {**todays["family"], "version": version}
    if version is None:
        del other["version"]
    message = f"state version {version}, this code reads version {STATE_VERSION}"
    with pytest.raises(ValueError, match=message):
        SearchState.from_dict(other)
    with pytest.raises(ValueError, match=message):
        FilterbankSearch(**SETTINGS).fit(corpus(), resume_from=other)


@pytest.mark.parametrize("state", [None, [], {"format": "not-a-search-state", "version": 3}])
def test_something_else_is_not_a_search_state(state):
    """A value that is not a checkpoint dict of this format is refused as such."""
    with pytest.raises(ValueError, match="not a burstlens search state"):
        SearchState.from_dict(state)


def _without(state, *path):
    out = copy.deepcopy(state)
    node = out
    for key in path[:-1]:
        node = node[key]
    del node[path[-1]]
    return out


def _with(state, value, *path):
    out = copy.deepcopy(state)
    node = out
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value
    return out


@pytest.mark.parametrize("damage, message", [
    (lambda s: _without(s, "phase"), "phase is missing"),
    (lambda s: _without(s, "refine", "records"), "refine.records is missing"),
    (lambda s: _with(s, "3", "round"), "round is str, expected int"),
    (lambda s: _with(s, True, "refine", "coord"), "refine.coord is bool, expected int"),
    (lambda s: _with(s, "stage 9", "phase"), "phase 'stage 9' is not one of"),
    (lambda s: _with(s, [1.0], "log"), "log is list, expected ConvergenceLog"),
    (lambda s: _with(s, {"x": {}}, "baselines"), "baselines.x is not a baseline"),
    (lambda s: _without(s, "family", "optimizer"), "family.optimizer is missing"),
    (lambda s: _with(s, None, "refine", "records", "3", "status"),
     "refine.records.3.status is NoneType, expected str"),
    (lambda s: _with(s, {"a": {}}, "refine", "records"), "records key 'a' is not a channel"),
])
def test_a_damaged_field_is_named(todays, damage, message):
    """A checkpoint of the right format and version with a field missing or of the wrong type
    is refused with a ValueError naming the field (the worker then starts over)."""
    with pytest.raises(ValueError, match=message):
        SearchState.from_dict(damage(todays["refine"]))
