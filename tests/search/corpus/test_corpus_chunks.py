"""Chunked miniSEED reading: blocks of whole records, joined back, equal the whole-file read
(search/corpus/readers.py, ``iter_waveform_chunks``)."""
import io
import math

import numpy as np
import pytest
from obspy import Stream, Trace, UTCDateTime

from burstlens.search.corpus import CorpusError
from burstlens.search.corpus import readers
from burstlens.search.corpus.preprocess import join_contiguous
from burstlens.search.corpus.readers import iter_waveform_chunks, read_waveform_file

START = UTCDateTime("2026-02-03T04:05:06.5")
RATE = 4000.0


def _trace(channel, data, start=START):
    return Trace(data, header={"network": "XX", "station": "CH01", "location": "00", "channel": channel,
                               "sampling_rate": RATE, "starttime": start})


def _records(stream, encoding, reclen):
    """The records ObsPy writes for ``stream``, as a list of ``reclen``-byte strings."""
    buf = io.BytesIO()
    stream.write(buf, format="MSEED", encoding=encoding, reclen=reclen)
    raw = buf.getvalue()
    assert len(raw) % reclen == 0
    return [raw[i: i + reclen] for i in range(0, len(raw), reclen)]


def _interleaved_file(path, encoding, reclen, n=300_000, seed=0):
    """Three channels of ``n`` int32 noise samples, GPN with a 1 s gap after its first third; the
    channels' records are interleaved round-robin, as a recorder writes them."""
    rng = np.random.default_rng(seed)
    data = np.rint(rng.standard_normal((3, n)) * 2000).astype(np.int32)
    cut = n // 3
    per_channel = [
        _records(Stream([_trace("GPZ", data[0])]), encoding, reclen),
        _records(Stream([_trace("GPN", data[1, :cut]), _trace("GPN", data[1, cut:], START + cut / RATE + 1.0)]),
                 encoding, reclen),
        _records(Stream([_trace("GPE", data[2])]), encoding, reclen),
    ]
    order = []
    for k in range(max(len(r) for r in per_channel)):
        order.extend(r[k] for r in per_channel if k < len(r))
    path.write_bytes(b"".join(order))
    return data


def _assert_same_traces(got, want, ordered=True):
    if not ordered:
        # a trace that opens in a later block comes after the traces of earlier blocks; the
        # whole-file read lists each id's traces together
        got, want = (sorted(ts, key=lambda t: (t.trace_id, t.start)) for ts in (got, want))
    assert [t.trace_id for t in got] == [t.trace_id for t in want]
    for a, b in zip(got, want, strict=True):
        assert a.file == b.file
        assert a.sampling_rate_hz == b.sampling_rate_hz
        assert a.start == b.start
        assert a.data.dtype == b.data.dtype
        assert np.array_equal(a.data, b.data)


@pytest.mark.parametrize("encoding", ["STEIM2", "INT32"])
@pytest.mark.parametrize("reclen", [512, 4096])
def test_blocks_join_to_whole_file(tmp_path, encoding, reclen):
    """miniSEED is a sequence of independent records (SEED Reference Manual v2.4, FDSN 2012, ch. 8), so
    decoding blocks of whole records and joining the pieces gives, sample for sample, what ObsPy
    (Krischer et al. 2015, the reference decoder) gives for the whole file: same ids, rates, starts
    and data, the gap in GPN still a split (the list order may differ: a trace that opens in a later
    block is listed after the traces of earlier ones). Blocks are the largest multiple of the record length
    within chunk_bytes (the brief's rule), so the block count is ceil(size / block)."""
    path = tmp_path / "interleaved.mseed"
    data = _interleaved_file(path, encoding, reclen)
    chunk_bytes = 50_000  # not a multiple of any record length
    chunks = list(iter_waveform_chunks(str(path), "MSEED", chunk_bytes=chunk_bytes))
    block = chunk_bytes // reclen * reclen
    assert len(chunks) == math.ceil(path.stat().st_size / block) > 10
    assert all(t.file == str(path) for chunk in chunks for t in chunk)

    whole = join_contiguous(read_waveform_file(str(path), "MSEED"))
    joined = join_contiguous([t for chunk in chunks for t in chunk])
    _assert_same_traces(joined, whole, ordered=False)
    # and both equal the samples written, the gap kept as two GPN traces
    assert sorted(t.trace_id for t in joined) == ["XX.CH01.00.GPE", "XX.CH01.00.GPN", "XX.CH01.00.GPN",
                                                  "XX.CH01.00.GPZ"]
    by_id = {}
    for t in joined:
        by_id.setdefault(t.trace_id, []).append(t.data)
    np.testing.assert_array_equal(by_id["XX.CH01.00.GPZ"][0], data[0])
    np.testing.assert_array_equal(np.concatenate(by_id["XX.CH01.00.GPN"]), data[1])
    np.testing.assert_array_equal(by_id["XX.CH01.00.GPE"][0], data[2])


def test_block_holds_at_least_one_record(tmp_path, monkeypatch):
    """With a chunk size below the record length each block is one record (the brief's rule), and
    without chunk_bytes the module's CHUNK_BYTES applies; joined, the records give ObsPy's whole-file
    read (SEED Reference Manual v2.4 ch. 8: records are independent)."""
    path = tmp_path / "small.mseed"
    _interleaved_file(path, "STEIM2", 512, n=6000)
    n_records = path.stat().st_size // 512
    chunks = list(iter_waveform_chunks(str(path), "MSEED", chunk_bytes=100))
    assert len(chunks) == n_records
    _assert_same_traces(join_contiguous([t for c in chunks for t in c]),
                        join_contiguous(read_waveform_file(str(path), "MSEED")), ordered=False)

    monkeypatch.setattr(readers, "CHUNK_BYTES", 2048)
    assert len(list(iter_waveform_chunks(str(path), "MSEED"))) == math.ceil(n_records / 4)


def test_file_cut_inside_its_last_record_streams_then_fails_at_that_record(tmp_path):
    """A file cut 200 bytes before its end is not a whole number of records (SEED Reference Manual
    v2.4, IRIS/FDSN 2012, ch. 8: a record is 2^e bytes, e from blockette 1000), so its last record
    is cut short. It still streams block by block (no whole-file load): the blocks before it equal
    ObsPy's decoding of the same records, and the last block is a CorpusError naming the file and
    the cut record's byte offset."""
    path = tmp_path / "cut.mseed"
    _interleaved_file(path, "STEIM2", 512, n=50_000)
    whole = path.read_bytes()
    size = len(whole) - 200
    path.write_bytes(whole[:size])
    last_record = size // 512 * 512
    gen = iter_waveform_chunks(str(path), "MSEED", chunk_bytes=4096)
    yielded = []
    with pytest.raises(CorpusError) as err:
        for chunk in gen:
            yielded.append(chunk)
    assert len(yielded) == last_record // 4096
    assert str(path) in str(err.value) and f"record at byte {last_record} is cut short" in str(err.value)
    intact = tmp_path / "intact.mseed"
    intact.write_bytes(whole[: len(yielded) * 4096])
    want = read_waveform_file(str(intact), "MSEED")
    for t in want:
        t.file = str(path)  # the same records, read from the cut file
    _assert_same_traces(join_contiguous([t for c in yielded for t in c]), join_contiguous(want), ordered=False)


def test_mixed_record_lengths_read_whole(tmp_path):
    """Records of 512 then 4096 bytes: the size is a multiple of the first record length, but block
    boundaries fall inside 4096-byte records, whose bytes are not a fixed header (SEED Reference
    Manual v2.4 ch. 8), so the file is read whole: one list, equal to read_waveform_file's, which
    ObsPy reads as one continuous trace."""
    rng = np.random.default_rng(1)
    data = np.rint(rng.standard_normal(100_000) * 500).astype(np.int32)
    first = b"".join(_records(Stream([_trace("GPZ", data[:50_000])]), "STEIM2", 512))
    second = b"".join(_records(Stream([_trace("GPZ", data[50_000:], START + 50_000 / RATE)]), "STEIM2", 4096))
    path = tmp_path / "mixed.mseed"
    path.write_bytes(first + second)
    chunk_bytes = 3 * 512  # boundaries 1536 apart cannot all land on the 4096-byte records
    assert path.stat().st_size % 512 == 0 and path.stat().st_size > chunk_bytes
    chunks = list(iter_waveform_chunks(str(path), "MSEED", chunk_bytes=chunk_bytes))
    assert len(chunks) == 1
    whole = read_waveform_file(str(path), "MSEED")
    _assert_same_traces(chunks[0], whole)
    np.testing.assert_array_equal(whole[0].data, data)


def test_corrupt_later_block_raises_and_stops(tmp_path):
    """A record whose Steim-2 data frames are garbage (every nibble and dnib 11, an impossible code,
    SEED Reference Manual v2.4 appendix B) fails ObsPy's decoder; the error is a CorpusError naming
    the file and the byte range of the block, raised after the earlier blocks were yielded, and
    nothing is yielded after it."""
    path = tmp_path / "corrupt.mseed"
    _interleaved_file(path, "STEIM2", 512, n=100_000)
    raw = bytearray(path.read_bytes())
    chunk_bytes = 8192
    bad_record = 200
    offset = bad_record * 512
    # keep the 64-byte fixed header and blockette 1000, ruin the data frames
    raw[offset + 64: offset + 512] = b"\xff" * 448
    path.write_bytes(bytes(raw))
    bad_block = offset // chunk_bytes
    gen = iter_waveform_chunks(str(path), "MSEED", chunk_bytes=chunk_bytes)
    yielded = []
    with pytest.raises(CorpusError) as err:
        for chunk in gen:
            yielded.append(chunk)
    assert len(yielded) == bad_block > 0
    message = str(err.value)
    assert str(path) in message
    assert f"bytes {bad_block * chunk_bytes}-{(bad_block + 1) * chunk_bytes}" in message
    with pytest.raises(StopIteration):
        next(gen)


def test_other_formats_and_small_files_yield_once(tmp_path):
    """A .npy array (NumPy format spec, NEP 1) and a miniSEED file smaller than chunk_bytes are read
    whole: exactly one list, equal to read_waveform_file's (common practice: no chunking below the
    bound)."""
    rng = np.random.default_rng(2)
    npy = tmp_path / "array.npy"
    np.save(npy, rng.standard_normal((2, 5000)))
    chunks = list(iter_waveform_chunks(str(npy), "NPY", csv_sampling_rate_hz=500.0, chunk_bytes=1024))
    assert len(chunks) == 1
    _assert_same_traces(chunks[0], read_waveform_file(str(npy), "NPY", csv_sampling_rate_hz=500.0))
    assert chunks[0][0].sampling_rate_hz == 500.0

    small = tmp_path / "small.mseed"
    _interleaved_file(small, "STEIM2", 512, n=3000)
    chunks = list(iter_waveform_chunks(str(small), "MSEED", chunk_bytes=small.stat().st_size))
    assert len(chunks) == 1
    _assert_same_traces(chunks[0], read_waveform_file(str(small), "MSEED"))


def test_memory_is_bounded_by_the_block(tmp_path):
    """About 47 MB of Steim-2 (3 channels x 3.6 M samples of wide int32 noise, about one sample per
    32-bit word; SEED Reference Manual v2.4 appendix B) read with 4 MiB blocks: no yielded list holds
    more than a quarter of the file's samples, and together they hold all of them (common practice:
    memory bound by the block, not the file)."""
    rng = np.random.default_rng(3)
    n = 3_600_000
    data = np.rint(rng.standard_normal((3, n)) * 1e6).astype(np.int32)
    path = tmp_path / "big.mseed"
    Stream([_trace(ch, row) for ch, row in zip(("GPZ", "GPN", "GPE"), data, strict=True)]).write(
        str(path), format="MSEED", encoding="STEIM2", reclen=4096)
    assert path.stat().st_size > 35e6
    largest = total = 0
    for chunk in iter_waveform_chunks(str(path), "MSEED", chunk_bytes=4 * 2**20):
        samples = sum(t.data.size for t in chunk)
        largest = max(largest, samples)
        total += samples
    assert total == data.size
    assert largest <= data.size / 4
