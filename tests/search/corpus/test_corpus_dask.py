"""read_corpus(..., mapper=) on a Dask cluster of worker processes: the files are read and the
passes run as tasks (search/corpus/ingest.py ``_Passes``), and the result is the local read's."""
import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime

from burstlens.search import FilterbankSearch
from burstlens.search.corpus import read_corpus

distributed = pytest.importorskip("distributed")

FS = 250.0
START = UTCDateTime(2026, 5, 2, 6, 0, 0)


def _record(seconds, seed):
    """Coloured noise with a decaying 40 Hz burst every ~6 s."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(int(seconds * FS)) * 10.0
    x[1:] += 0.5 * x[:-1]
    k = np.arange(int(FS))
    for onset in np.arange(4.0, seconds - 4.0, 6.0) + rng.uniform(-1.5, 1.5, int((seconds - 8.0) // 6.0) + 1):
        i = int(onset * FS)
        x[i: i + k.size] += rng.uniform(150, 900) * np.sin(2 * np.pi * 40.0 * k / FS) * np.exp(-k / (0.2 * FS))
    return np.rint(x).astype(np.int32)


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """Three stations of two channels in 5-minute files (three groups of files joined by their
    traces), one file with a NaN gap, and a copy of station S1 under the name S9 (the same samples:
    duplicates across groups)."""
    folder = tmp_path_factory.mktemp("site")
    for station, seed in (("S1", 1), ("S2", 2), ("S3", 3)):
        data = {cha: _record(1200.0, seed * 10 + k) for k, cha in enumerate(("HHZ", "HHN"))}
        if station == "S2":
            data["HHN"] = data["HHN"].astype(np.float64)
            data["HHN"][70_000:70_400] = np.nan
        for part, a in enumerate(range(0, 300_000, 75_000)):
            for name in ((station, "S9") if station == "S1" else (station,)):
                Stream([Trace(d[a: a + 75_000], header={"network": "XX", "station": name, "location": "00",
                                                        "channel": cha, "sampling_rate": FS,
                                                        "starttime": START + a / FS})
                        for cha, d in data.items()]).write(str(folder / f"{name}.{part}.mseed"), format="MSEED")
    return folder


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None)
    with cluster, distributed.Client(cluster) as c:
        yield c


def _on(client, calls=None):
    def mapper(fn, items):
        items = list(items)
        if calls is not None:
            calls.append(len(items))
        return client.gather(client.map(fn, items, pure=False))
    return mapper


@pytest.mark.parametrize("options", [{"max_windows": 300, "seed": 5}, {"windowing": "sliding", "window_s": 2.0},
                                     {"windowing": "whole", "components": "Z"}])
def test_the_cluster_read_is_the_local_read(site, client, options):
    """On a LocalCluster of two worker processes the windows are bit-identical and in the same
    order, and the window records, traces, rejections (the cross-group duplicates included),
    defaults and hash equal the local read's. Source: the issue's contract (--dask: identical
    result); Dask's map/gather keep the order of the items (Dask distributed documentation)."""
    local = read_corpus(site, **options)
    calls = []
    remote = read_corpus(site, mapper=_on(client, calls), **options)
    assert calls[0] == 16 and max(calls[1:]) == 4  # tasks: the files, then the groups (stations S1, S2, S3, S9)
    np.testing.assert_array_equal(remote.windows, local.windows)
    for field in ("window_meta", "traces", "rejections", "defaults", "source_hash", "files"):
        assert getattr(remote, field) == getattr(local, field), field
    if "max_windows" in options:
        assert local.defaults["windows_found"] > local.n_windows == 300
        assert local.rejected_by_reason().get("duplicate", 0) > 0


def test_the_cluster_read_gives_the_same_filterbank(site, client):
    """A small seeded search on the corpus read on the cluster returns the filterbank of the local
    read, byte for byte as JSON. Source: the issue's contract (same filterbank)."""
    import json

    settings = {"channels": 6, "evaluations": 6, "bootstrap": 0, "seed": 3, "refine": False}
    fits = [FilterbankSearch(**settings).fit(read_corpus(site, max_windows=60, mapper=m)).filterbank_
            for m in (None, _on(client))]
    assert json.dumps(fits[0].to_json(), sort_keys=True) == json.dumps(fits[1].to_json(), sort_keys=True)
