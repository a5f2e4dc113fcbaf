"""Seeded subset of reliability experiment 8: kill -9 the continuous-transform worker inside a
chunk write; the store never claims a chunk it does not hold, and the job resumes to the same
store as an uninterrupted run."""
import random
import shutil

import numpy as np
import pytest

from reliability import transform_kills
from reliability.transform_kills import CREATING, PHASES, Moment, audit, make_plan

PART = "XX.KEEL.00.HHZ/20260309T060000.000000Z"


@pytest.mark.slow
def test_transform_killed_mid_chunk_resumes_to_the_identical_store():
    """A transform job whose worker is SIGKILLed with a share of chunk 0's bytes in Zarr's temp
    file, then (the next attempt) with a share of the part's new ``zarr.json`` in the temp file
    after chunk 1 is in place (seed 4 draws ``0:torn:0.13`` and ``1:marker:0.07``): right after
    each kill the store, opened read-only, claims exactly the chunks written before it and each
    claimed chunk holds the bytes of an uninterrupted ``transform_continuous`` run; each next
    attempt plans only the chunks left (it resumed); the job ends done with every array and
    attribute of its store equal to the uninterrupted run's (service/tuned_site.py: "an attempt
    that dies resumes from the last complete chunk"; search/continuous.py: ``complete_until``
    advanced "after the chunk: never claims more"; kill -9 semantics: POSIX signal(7), SIGKILL
    cannot be caught)."""
    (row,) = transform_kills.run(kills=2, creations=0, per_job=2, n_chunks=3, seed=4)
    assert "torn 1/1" in row.counts and "marker 1/1" in row.counts, row.counts
    assert row.met, (row.counts, row.result, row.details)


def test_every_moment_of_a_plan_is_reached_by_the_attempt_after_the_last_kill():
    """Property: within a job's chain the killed chunks are distinct and increasing, so the
    attempt that resumes after a kill (at that chunk, or the next one after ``marked``) reaches
    the next moment; every phase is drawn before any repeats; only the tearing phases carry a
    share in (0, 1); a creation kill leads only the chains asked for (the plan's own contract,
    reliability/transform_kills.py)."""
    for seed in range(20):
        chains = make_plan(random.Random(seed), 7, 10, 4, creations=2)
        assert [chain[0].phase == CREATING for chain in chains] == [True, True, False]
        assert all(m.phase != CREATING for chain in chains for m in chain[1:])
        chains = make_plan(random.Random(seed), 7, 10, 4)
        moments = [m for chain in chains for m in chain]
        assert len(moments) == 10 and max(len(c) for c in chains) == 4
        assert set(m.phase for m in moments[:5]) == set(PHASES)
        for chain in chains:
            chunks = [m.chunk for m in chain]
            assert chunks == sorted(set(chunks)) and chunks[0] >= 0 and chunks[-1] < 7
        for m in moments:
            assert (m.share is not None) == (m.phase in ("torn", "marker"))
            assert m.share is None or 0.0 < m.share < 1.0
            assert Moment.parse(m.spec) == m


def _store(path, complete_until: int):
    """A store of the continuous layout (search/continuous.py's module docstring): chunks of 4
    time steps, 10 steps, 3 channels."""
    import zarr

    root = zarr.open_group(str(path), mode="w", zarr_format=3)
    root.attrs.update({"reading": {"chunk_steps": 4}})
    part = root.require_group(PART.split("/")[0]).create_group(PART.split("/")[1])
    part.attrs["complete_until"] = complete_until
    image = part.create_array("image", shape=(10, 3), chunks=(4, 3), dtype="float32",
                              fill_value=float("nan"))
    image[:] = np.arange(30, dtype=np.float32).reshape(10, 3)
    times = part.create_array("time", shape=(10,), chunks=(4,), dtype="int64", fill_value=0)
    times[:] = np.arange(10) * 10_000_000
    return part


def test_the_audit_finds_a_claimed_chunk_without_its_bytes_and_a_torn_marker(tmp_path):
    """Property: the check run after every kill can fail. A store whose marker claims a chunk
    that still reads as Zarr's fill value (never written) is reported with that chunk; the same
    store claiming only the chunks it holds is clean; a part whose ``zarr.json`` is cut short
    (what a non-atomic metadata write killed midway would leave) is reported unreadable."""
    _store(tmp_path / "reference.zarr", 10)
    part = _store(tmp_path / "store.zarr", 8)
    part["image"][4:8] = np.nan  # chunk 1 not written
    found = audit(tmp_path / "store.zarr", tmp_path / "reference.zarr")
    assert (found.complete_until, found.exposed, found.problem) == (8, [1], None)
    part.attrs["complete_until"] = 4
    assert audit(tmp_path / "store.zarr", tmp_path / "reference.zarr").exposed == []

    torn = tmp_path / "torn.zarr"
    shutil.copytree(tmp_path / "reference.zarr", torn)
    marker = torn / PART / "zarr.json"
    marker.write_bytes(marker.read_bytes()[:40])
    assert audit(torn, tmp_path / "reference.zarr").problem.startswith("cannot read the store")


class _Stopped(BaseException):
    """Raised in place of a write: the run ends there, as a kill would end it."""


def _stopping(put, writes: int):
    """Zarr's ``_put`` that makes ``writes`` writes, then raises in place of the next."""
    left = [writes]

    def stopping_put(path, value, exclusive=False):
        if left[0] == 0:
            raise _Stopped
        left[0] -= 1
        return put(path, value, exclusive)

    return stopping_put


def test_a_run_stopped_at_any_write_of_its_store_resumes_to_the_same_store(tmp_path, monkeypatch):
    """In-process counterpart of the row, over every write the run makes (each key Zarr's local
    store puts: the root, the trace and part groups with their attributes, the arrays, the
    coordinates, each chunk and marker, the seam): a run stopped before that write, then run
    again over the same file, leaves a store whose every array and attribute equals an
    uninterrupted run's, and no Zarr temp file. Regression: a stop while the part was being
    created left a store the next run could not open (KeyError 'image', 'time', 'start_ns', or
    "written with another filterbank" when the root's attributes were cut short), or finished
    with ``frequency`` and ``time_spread_s`` left at their fill value (search/continuous.py:
    "A run that dies resumes at complete_until")."""
    import obspy
    import zarr.storage._local as local

    from burstlens.search.continuous import transform_continuous
    from burstlens.search.documents import FilterbankDocument
    from burstlens.search.filterbank import Filterbank, center_grid
    from reliability.transform_kills import snapshot, temp_files

    fs = 100.0
    document = FilterbankDocument.of(Filterbank.constant_q(center_grid((4.0, 40.0), 4), 5.0, fs))
    x = np.random.default_rng(0).standard_normal(5000).astype(np.float32)
    wave = tmp_path / "a.mseed"
    obspy.Trace(x, header={"network": "XX", "station": "S", "location": "00", "channel": "HHZ",
                           "sampling_rate": fs, "starttime": obspy.UTCDateTime(2024, 3, 1)}
                ).write(str(wave), format="MSEED")

    def run(out):
        return transform_continuous([str(wave)], document, str(out), piece_samples=2048)

    run(tmp_path / "reference.zarr")
    want = snapshot(tmp_path / "reference.zarr")
    real = local._put
    writes = []
    monkeypatch.setattr(local, "_put", lambda path, value, exclusive=False: (
        writes.append(path), real(path, value, exclusive))[1])
    run(tmp_path / "counted.zarr")
    assert len(writes) > 30  # the groups and arrays made, each chunk and its marker, the seam
    for k in range(len(writes)):
        out = tmp_path / f"stopped-{k}.zarr"
        monkeypatch.setattr(local, "_put", _stopping(real, k))
        with pytest.raises(_Stopped):
            run(out)
        monkeypatch.setattr(local, "_put", real)
        run(out)
        mine = snapshot(out)
        assert mine == want, (k, writes[k], sorted(n for n in want if mine.get(n) != want[n])[:4])
        assert temp_files(out) == []
