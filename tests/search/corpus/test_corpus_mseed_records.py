"""miniSEED record layout: truncated and garbage records are a CorpusError naming the file and the
record's byte offset, in whole-file and streamed reads (search/corpus/mseed_records.py,
search/corpus/readers.py).

The files come from outside the project: the miniSEED test data ObsPy ships
(``obspy/io/mseed/tests/data``; ObsPy: M. Krischer et al., "ObsPy: a bridge for seismology into the
scientific Python ecosystem", Comput. Sci. Discov. 8, 2015) and ``obspy.read()``'s example stream
written with ``Stream.write(format="MSEED")``. The record structure checked is the SEED Reference
Manual v2.4 (IRIS/FDSN 2012), chapter 8 ("fixed section of data header": 48 bytes, record length
2^e from blockette 1000) and appendix B (Steim compression: the reverse integration constant X_n
equals the record's last sample).
"""
import io
import os
import struct
import warnings

import numpy as np
import obspy
import pytest
from obspy.io.mseed.headers import clibmseed

from burstlens.search.corpus import CorpusError
from burstlens.search.corpus.mseed_records import RecordError, _walk, record_layout
from burstlens.search.corpus.readers import detect_format, iter_waveform_chunks, read_waveform_file

DATA = os.path.join(os.path.dirname(obspy.__file__), "io", "mseed", "tests", "data")
TEN_RECORDS = "BW.BGLD.__.EHE.D.2008.001.first_10_records"  # 10 records of 512 bytes, Steim-1
# ObsPy's test files that are whole, valid miniSEED data records (full SEED volumes, noise-first
# files and the deliberately damaged ones left out; those are tested on their own below)
VALID = [TEN_RECORDS, "1T_MONN_00_EDH.mseed", "CH.BALST..LH_two_channels", "SRO_encoding.mseed",
         "WUQ.XJ.HHN.D.2008.285.first_record", "bizarre/endiantest.le-header.le-data.mseed",
         "bizarre/endiantest.be-header.le-data.mseed", "bizarre/mseed_no_blkt_1000.mseed",
         "mseed_not_a_single_blkt_48byte_data_offset.mseed", "constructedFileToTestReadViaRecords.mseed",
         "dataquality-m.mseed", "encoding/float64_Float64_littleEndian.mseed",
         "encoding/int32_Steim2_littleEndian.mseed", "gaps.mseed", "qualityflags.mseed",
         "reclen_1024_without_sequence_numbers.mseed", "record_with_invalid_word_order.mseed",
         "single_record_plus_noise_record.mseed", "steim2.mseed", "test.mseed", "timingquality.mseed",
         "two_channels.mseed", "wrong_blockette_numbers_specified.mseed", "gecko_non_ascii_header.ms"]


def _bytes(name: str) -> bytes:
    with open(os.path.join(DATA, name), "rb") as fh:
        return fh.read()


def _obspy_example() -> bytes:
    """``obspy.read()``'s example (3 traces, 3000 samples each) as ObsPy writes it: 4096-byte
    records, float32 samples."""
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        obspy.read().write(buf, format="MSEED")
    return buf.getvalue()


def _ms_detect(raw: bytes, offset: int) -> int:
    """libmseed's record length at ``offset`` (as bundled with ObsPy): 2^e, or 0 when unknown."""
    buf = np.frombuffer(raw[offset:], dtype=np.int8)
    return clibmseed.ms_detect(buf, len(buf))


def _obspy_samples(raw: bytes) -> int:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return sum(len(tr.data) for tr in obspy.read(io.BytesIO(raw), format="MSEED"))


def _write(tmp_path, name: str, raw: bytes) -> str:
    path = tmp_path / name
    path.write_bytes(raw)
    return str(path)


@pytest.mark.parametrize("name", VALID)
def test_layout_of_obspy_files_matches_libmseed_and_the_decoded_samples(name):
    """Property: for each valid file of ObsPy's test data, every record the walk finds starts where
    libmseed (ObsPy's bundled decoder) detects a record of the same length (or, without blockette
    1000, of unknown length: 0), the records tile the file up to noise padding, and their fixed
    headers declare exactly the samples ObsPy decodes (SEED Reference Manual v2.4 ch. 8: bytes
    30–31 hold the record's sample count). The vectorised check of runs of equal records and the
    record-by-record walk give the same layout."""
    raw = _bytes(name)
    layout = record_layout(raw)
    assert len(layout) >= 1
    for offset, length in zip(layout.offsets.tolist(), layout.lengths.tolist(), strict=True):
        assert _ms_detect(raw, offset) in (length, 0), offset
    assert int(layout.offsets[-1] + layout.lengths[-1]) <= len(raw)
    assert layout.declared_samples == _obspy_samples(raw)
    exact = _walk(raw, 0, 0)
    for a, b in ((layout.offsets, exact.offsets), (layout.lengths, exact.lengths), (layout.samples, exact.samples)):
        np.testing.assert_array_equal(a, b)


def test_truncation_at_every_byte_of_a_real_file(tmp_path):
    """ObsPy's ten-record file (512-byte Steim-1 records) cut after every byte from 1 to 5119:
    cut on a record boundary it is a valid shorter file, and it reads to exactly the samples ObsPy
    decodes from the same records; cut inside record k it is a CorpusError naming the file and
    byte 512·k (SEED Reference Manual v2.4 ch. 8: a record is its blockette 1000's 2^9 bytes);
    fewer than 48 bytes are no miniSEED at all (the fixed header is 48 bytes)."""
    raw = _bytes(TEN_RECORDS)
    path = str(tmp_path / "cut.mseed")
    boundaries = 0
    for cut in range(1, len(raw)):
        blob = raw[:cut]
        with open(path, "wb") as fh:
            fh.write(blob)
        if cut < 48:
            assert detect_format(blob, cut) != "MSEED"
            continue
        assert detect_format(blob, cut) == "MSEED"
        if cut % 512 == 0:
            boundaries += 1
            traces = read_waveform_file(path, "MSEED")
            got = np.concatenate([t.data for t in traces])
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                want = np.concatenate([tr.data for tr in obspy.read(io.BytesIO(blob), format="MSEED")])
            np.testing.assert_array_equal(got, want)
            assert got.size == 412 * cut // 512
        else:
            with pytest.raises(CorpusError, match=rf"^{path}: miniSEED record at byte {cut // 512 * 512} is cut short"):
                read_waveform_file(path, "MSEED")
    assert boundaries == 9


@pytest.mark.parametrize("source", ["obspy-example", "timingquality.mseed",
                                    "bizarre/endiantest.le-header.le-data.mseed", "CH.BALST..LH_two_channels"])
def test_truncation_at_every_record_boundary_and_inside_every_record(tmp_path, source):
    """Real files of 4096-byte (ObsPy's example written by ObsPy; a little-endian header) and
    512-byte records (timing quality, two interleaved channels): cut at every record boundary the
    file reads, with the samples the remaining records declare; cut 1, 47, 48, 56 and
    (length − 1) bytes into every record it is a CorpusError naming the file and that record's
    offset (SEED Reference Manual v2.4 ch. 8). The 611-record file is cut at a sample of its
    records (every 7th) to stay quick."""
    raw = _obspy_example() if source == "obspy-example" else _bytes(source)
    layout = record_layout(raw)
    path = str(tmp_path / "cut.mseed")
    step = 7 if len(layout) > 200 else 1
    for k in range(0, len(layout), step):
        start, length = int(layout.offsets[k]), int(layout.lengths[k])
        if k:
            with open(path, "wb") as fh:
                fh.write(raw[:start])
            assert sum(t.data.size for t in read_waveform_file(path, "MSEED")) == int(layout.samples[:k].sum())
        for into in (1, 47, 48, 56, length - 1):
            if start + into < 48:
                continue
            with open(path, "wb") as fh:
                fh.write(raw[: start + into])
            with pytest.raises(CorpusError, match=rf"^{path}: miniSEED record at byte {start} is cut short"):
                read_waveform_file(path, "MSEED")


@pytest.mark.parametrize("garbage", ["random", "zeros", "quality X", "hour 24", "day 0 both orders",
                                     "half a record", "blockette inside the header"])
def test_garbage_record_names_its_offset(tmp_path, garbage):
    """Record 4 of ObsPy's ten-record file replaced by garbage — random bytes, zeros, a header whose
    quality indicator is not D/R/Q/M, whose hour is 24, whose day of year is 0 in both byte
    orders, its own second half (the first half lost), or a first blockette pointing inside
    the fixed header — is a CorpusError naming the file and byte 2048 (SEED Reference Manual v2.4
    ch. 8: fixed section of data header and blockette chain)."""
    raw = bytearray(_bytes(TEN_RECORDS))
    at = 4 * 512
    record = raw[at: at + 512]
    if garbage == "random":
        record = np.random.default_rng(4).integers(0, 256, 512, dtype=np.uint8).tobytes()
        cause = "does not open with a SEED fixed header"
    elif garbage == "zeros":
        record = bytes(512)
        cause = "quality indicator"
    elif garbage == "quality X":
        record[6:7] = b"X"
        cause = "quality indicator b'X'"
    elif garbage == "hour 24":
        record[24] = 24
        cause = "not a time of day"
    elif garbage == "day 0 both orders":
        record[22:24] = b"\x00\x00"
        cause = "year and day of year are implausible"
    elif garbage == "half a record":
        cause = "does not open with a SEED fixed header"
    else:
        struct.pack_into(">H", record, 46, 20)
        cause = "broken blockette chain"
    if garbage == "half a record":
        del raw[at: at + 256]  # record 4 loses its first half: its second half follows record 3
    else:
        raw[at: at + 512] = record
    path = _write(tmp_path, "garbage.mseed", bytes(raw))
    with pytest.raises(CorpusError, match=rf"^{path}: miniSEED record at byte {at} .*{cause}"):
        read_waveform_file(path, "MSEED")


@pytest.mark.parametrize("name, offset, cause", [
    ("brokenlastrecord.mseed", 4096, "does not open with a SEED fixed header"),
    ("corrupt_one_extra_byte_at_end.mseed", 512, "is cut short: 1 bytes remain"),
    ("infinite-loop.mseed", 1024, "has a broken blockette chain"),
])
def test_obspys_own_damaged_files(tmp_path, name, offset, cause):
    """ObsPy's test data ships damaged files: the first two ObsPy reads without an error, dropping
    their damaged tail (the gap this closes); the third ObsPy refuses. Against the SEED Reference
    Manual v2.4 ch. 8 (a record is 2^e bytes; blockettes follow the 48-byte fixed header), each is
    a CorpusError naming the file and the damaged record's offset."""
    raw = _bytes(name)
    if name != "infinite-loop.mseed":
        assert _obspy_samples(raw) == record_layout(raw[:offset]).declared_samples
    path = _write(tmp_path, os.path.basename(name), raw)
    with pytest.raises(CorpusError, match=rf"^{path}: miniSEED record at byte {offset} {cause}"):
        read_waveform_file(path, "MSEED")


def test_noise_record_is_padding():
    """A noise record (a sequence number followed by spaces; ObsPy's single_record_plus_noise_record
    test file) is padding that libmseed skips: the layout holds the one data record, with the
    samples ObsPy decodes."""
    raw = _bytes("single_record_plus_noise_record.mseed")
    layout = record_layout(raw)
    assert layout.offsets.tolist() == [0] and layout.lengths.tolist() == [512]
    assert layout.declared_samples == _obspy_samples(raw) == 277


@pytest.mark.parametrize("damage, cause", [
    ("X_n", "integrity check"),
    ("samples + 1", "only decoded 412 samples of 413"),
    ("samples - 1", "integrity check"),
    ("encoding 99", "not a valid MiniSEED encoding"),
])
def test_damaged_data_section_names_its_record(tmp_path, damage, cause):
    """Record 6 of ObsPy's ten-record file keeps a valid header but its data no longer agree with
    it: the reverse integration constant X_n (frame 0, word 2) changed, the header's sample count
    one more or one less than the Steim-1 frames hold, or an unknown encoding in blockette 1000
    (SEED Reference Manual v2.4 ch. 8 and appendix B). ObsPy warns or fails for the whole file;
    the reader's error names the file and byte 3072, found by bisection over the records."""
    raw = bytearray(_bytes(TEN_RECORDS))
    at = 6 * 512
    data = struct.unpack_from(">H", raw, at + 44)[0]
    if damage == "X_n":
        raw[at + data + 8: at + data + 12] = b"\x00\x01\x02\x03"
    elif damage.startswith("samples"):
        struct.pack_into(">H", raw, at + 30, 412 + (1 if damage.endswith("+ 1") else -1))
    else:
        raw[at + 48 + 4] = 99  # blockette 1000 at byte 48: type, next, then the encoding
    path = _write(tmp_path, "damaged.mseed", bytes(raw))
    with pytest.raises(CorpusError, match=rf"^{path}: miniSEED record at byte {at} cannot be decoded \(.*{cause}"):
        read_waveform_file(path, "MSEED")


def test_streamed_read_names_the_garbage_record_after_earlier_blocks(tmp_path):
    """Streamed in 2048-byte blocks (4 records), ObsPy's 101-record timing-quality file with record
    37 overwritten by random bytes: the blocks before it are yielded, then a CorpusError names the
    file and byte 37·512 (the block boundaries stay record headers, so the file streams); with
    X_n damaged instead (SEED Reference Manual v2.4 appendix B) the error names the same record
    and its block's byte range."""
    raw = bytearray(_bytes("timingquality.mseed"))
    at = 37 * 512
    for damage in ("random", "X_n"):
        bad = bytearray(raw)
        if damage == "random":
            bad[at: at + 512] = np.random.default_rng(5).integers(0, 256, 512, dtype=np.uint8).tobytes()
        else:
            data = struct.unpack_from(">H", bad, at + 44)[0]
            bad[at + data + 8: at + data + 12] = b"\x7f\x00\x00\x01"
        path = _write(tmp_path, f"{damage}.mseed", bytes(bad))
        yielded = []
        with pytest.raises(CorpusError) as err:
            for chunk in iter_waveform_chunks(path, "MSEED", chunk_bytes=2048):
                yielded.append(chunk)
        assert len(yielded) == at // 2048
        block = at // 2048 * 2048
        assert str(err.value).startswith(f"{path} (bytes {block}-{block + 2048}): miniSEED record at byte {at} ")


def test_layout_offsets_count_from_the_file_start():
    """Property: the walk of a run of records that starts at byte ``base`` reports offsets from the
    file's start, in the layout and in the error (a block of a streamed file)."""
    raw = _bytes(TEN_RECORDS)
    tail = record_layout(raw[1024:], base=1024)
    np.testing.assert_array_equal(tail.offsets, np.arange(1024, 5120, 512))
    with pytest.raises(RecordError) as err:
        record_layout(raw[1024:-10], base=1024)
    assert err.value.offset == 4608


def test_mixed_record_lengths_are_walked_record_by_record():
    """Records of 512 bytes, then of 4096 (ObsPy's ten-record file followed by its steim2 test
    record): the layout lists each at its own length (SEED Reference Manual v2.4 ch. 8: every
    record carries its own blockette 1000), with the samples ObsPy decodes."""
    raw = _bytes(TEN_RECORDS) + _bytes("steim2.mseed")
    layout = record_layout(raw)
    assert layout.offsets.tolist() == list(range(0, 5120, 512)) + [5120]
    assert layout.lengths.tolist() == [512] * 10 + [4096]
    assert layout.declared_samples == _obspy_samples(raw)


def test_impossible_record_length_in_the_first_record_streams_no_block(tmp_path):
    """Blockette 1000 of the first record declaring 2^255 bytes (its exponent byte 255; SEED
    Reference Manual v2.4 ch. 8) is no block size to stream by: the streamed read, like the
    whole-file read, is a CorpusError naming the file and byte 0 (the bad-input campaign found
    the streamed read raising OverflowError)."""
    raw = bytearray(_bytes("timingquality.mseed"))
    raw[48 + 6] = 255
    path = _write(tmp_path, "exponent.mseed", bytes(raw))
    for read in (lambda: read_waveform_file(path, "MSEED"),
                 lambda: list(iter_waveform_chunks(path, "MSEED", chunk_bytes=2048))):
        with pytest.raises(CorpusError, match=rf"^{path}: miniSEED record at byte 0 declares a record length "
                                              r"of 2\^255"):
            read()
