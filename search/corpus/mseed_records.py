"""The record layout of miniSEED bytes: where each record starts, how long it is, how many samples
its header declares, and the first place where the bytes stop being whole, valid records.

A miniSEED file is a sequence of independent records (SEED Reference Manual v2.4, IRIS/FDSN 2012,
ch. 8). Each data record opens with the 48-byte fixed section of data header:

======  =====  ==========================================================================
bytes   type   field
======  =====  ==========================================================================
0–5     ASCII  sequence number (digits; spaces or NULs are tolerated, as libmseed does)
6       ASCII  data header/quality indicator: D, R, Q or M
7       ASCII  reserved byte: space (NUL tolerated)
20–29   BTIME  record start: year (UWORD), day of year (UWORD), hour, minute, second (UBYTE), …
30–31   UWORD  number of samples
46–47   UWORD  offset of the first blockette from the record's start (0: none)
======  =====  ==========================================================================

The record length is 2^e bytes, e from blockette 1000 (type 1000; byte 6 of the blockette is e).
Each blockette opens with its type and the offset of the next one (UWORD each, 0 ends the chain).
The header's byte order is the one in which the year and day are plausible (1900–2100, 1–366),
big-endian tried first, as ObsPy's ``get_record_information`` does. A record without blockette
1000 (allowed by ObsPy and libmseed, not by the manual) runs to the next valid header at a
128-byte step, or to the end of the bytes, and that length must be a power of two. A "noise"
record (a sequence number followed by spaces to byte 47) is padding, skipped the same way; ObsPy's
libmseed skips it too.

:func:`record_layout` walks the bytes and raises :class:`RecordError`, which names the record's
byte offset, at the first record that is cut short, whose header is not a fixed header, or whose
blockette chain is broken.
"""
from __future__ import annotations

import struct
from dataclasses import dataclass

import numpy as np

FIXED_HEADER_BYTES = 48
# ObsPy: "The smallest possible mini-SEED record is made up of 128 bytes"; libmseed searches for a
# record without blockette 1000 at steps of this size.
MIN_RECORD_BYTES = 128
# The largest record length read (2^20 bytes): a bound of ours, far above what recorders write
# (256–4096 bytes, common practice), that keeps a damaged exponent from declaring gigabytes.
MAX_RECORD_BYTES = 2**20
BLOCKETTE_1000 = 1000
_QUALITY = b"DRQM"
_SEQUENCE = b"0123456789 \x00"
_SEQUENCE_BYTE = np.isin(np.arange(256), list(_SEQUENCE))  # lookup tables by byte value
_QUALITY_BYTE = np.isin(np.arange(256), list(_QUALITY))


class RecordError(ValueError):
    """The bytes stop being whole, valid miniSEED records at byte ``offset`` (from the start of
    the file, when the walk was given the bytes' ``base``)."""

    def __init__(self, offset: int, cause: str):
        super().__init__(f"record at byte {offset} {cause}")
        self.offset = offset
        self.cause = cause


@dataclass(frozen=True)
class RecordLayout:
    """The data records found in a run of miniSEED bytes (noise records left out).

    Attributes
    ----------
    offsets : ndarray, shape (R,), int64
        Byte offset of each data record, from the start of the file (the walk's ``base`` added).
    lengths : ndarray, shape (R,), int64
        Its length, bytes.
    samples : ndarray, shape (R,), int64
        The number of samples its fixed header declares (bytes 30–31).
    """

    offsets: np.ndarray
    lengths: np.ndarray
    samples: np.ndarray

    @property
    def declared_samples(self) -> int:
        return int(self.samples.sum())

    def __len__(self) -> int:
        return int(self.offsets.size)


def fixed_header_order(head: bytes) -> tuple[str | None, str]:
    """Byte order of a fixed section of data header (``">"`` or ``"<"``) and ``""``, or None and
    what is wrong with it. ``head`` holds at least the header's 48 bytes.

    The checks are libmseed's test of a valid header (sequence number characters, quality
    indicator, reserved byte, hour ≤ 23, minute ≤ 59, second ≤ 60) and a plausible year and day
    (1900–2100, 1–366) in one byte order.
    """
    if any(c not in _SEQUENCE for c in head[:6]):
        return None, f"sequence number {bytes(head[:6])!r} is not digits"
    if head[6] not in _QUALITY:
        return None, f"quality indicator {bytes(head[6:7])!r} is not D, R, Q or M"
    if head[7] not in b" \x00":
        return None, f"reserved byte 7 is {bytes(head[7:8])!r}, not a space"
    hour, minute, second = head[24], head[25], head[26]
    if hour > 23 or minute > 59 or second > 60:
        return None, f"start time {hour:02d}:{minute:02d}:{second:02d} is not a time of day"
    for order in (">", "<"):
        year, day = struct.unpack_from(order + "HH", head, 20)
        if 1900 <= year <= 2100 and 1 <= day <= 366:
            return order, ""
    return None, "year and day of year are implausible in either byte order"


def is_noise_record(head: bytes) -> bool:
    """Whether 48 bytes open a noise (padding) record: a sequence number, then spaces."""
    return all(c in _SEQUENCE for c in head[:6]) and head[6:FIXED_HEADER_BYTES] == b" " * 42


def record_layout(raw: bytes, base: int = 0) -> RecordLayout:
    """Walk ``raw`` (whole miniSEED records from its first byte to its last) record by record.

    Parameters
    ----------
    raw : bytes
        The bytes of a miniSEED file, or of a run of its records starting on a record.
    base : int
        Byte offset of ``raw[0]`` in the file; offsets in the result and in errors include it.

    Returns
    -------
    RecordLayout
        The data records, in file order.

    Raises
    ------
    RecordError
        At the first record (offset from the file's start) that is not whole and valid: fewer
        than 48 bytes left, a fixed header that fails :func:`fixed_header_order`, a broken
        blockette chain, a record length outside 128 B–1 MiB or not a power of two, or a record
        running past the end of ``raw``.
    """
    # the leading run of records of the first one's length, all checked at once; the exact walk
    # takes over at the first record that differs (a cut, garbage, another length or layout)
    run = _uniform_run(raw, base)
    rest = _walk(raw, base, int(run.lengths.sum()))
    if not len(rest):
        return run
    return RecordLayout(*(np.concatenate([a, b]) for a, b in ((run.offsets, rest.offsets),
                                                               (run.lengths, rest.lengths),
                                                               (run.samples, rest.samples))))


def _uniform_run(raw: bytes, base: int) -> RecordLayout:
    """The leading records of ``raw`` that are whole, of the first record's length, and open with
    a valid fixed header directly followed by blockette 1000 (how recorders and ObsPy write),
    checked for all records at once; empty when the first record is otherwise."""
    empty = RecordLayout(*(np.zeros(0, dtype=np.int64) for _ in range(3)))
    if len(raw) < FIXED_HEADER_BYTES + 8:
        return empty
    order, _ = fixed_header_order(raw[:FIXED_HEADER_BYTES])
    if order is None or struct.unpack_from(order + "H", raw, 46)[0] != FIXED_HEADER_BYTES:
        return empty
    exponent = raw[FIXED_HEADER_BYTES + 6]
    reclen = 1 << exponent
    if not MIN_RECORD_BYTES <= reclen <= MAX_RECORD_BYTES or len(raw) < reclen:
        return empty
    n = len(raw) // reclen
    rows = np.frombuffer(raw, dtype=np.uint8, count=n * reclen).reshape(n, reclen)[:, :FIXED_HEADER_BYTES + 8]
    ok = _SEQUENCE_BYTE[rows[:, :6]].all(axis=1) & _QUALITY_BYTE[rows[:, 6]]
    ok &= (rows[:, 7] == 32) | (rows[:, 7] == 0)
    ok &= (rows[:, 24] <= 23) & (rows[:, 25] <= 59) & (rows[:, 26] <= 60)
    ok &= rows[:, FIXED_HEADER_BYTES + 6] == exponent
    fields = {}
    for name, at in (("year", 20), ("day", 22), ("samples", 30), ("blockette", 46),
                     ("type", FIXED_HEADER_BYTES)):
        hi, lo = rows[:, at].astype(np.int64), rows[:, at + 1].astype(np.int64)
        fields[name] = (hi << 8 | lo, lo << 8 | hi)  # (big-endian, little-endian)
    big = _plausible(fields["year"][0], fields["day"][0])
    little = ~big & _plausible(fields["year"][1], fields["day"][1])
    ok &= big | little

    def pick(name):
        return np.where(big, fields[name][0], fields[name][1])

    ok &= (pick("blockette") == FIXED_HEADER_BYTES) & (pick("type") == BLOCKETTE_1000)
    n = int(np.argmin(ok)) if not ok.all() else n
    offsets = base + reclen * np.arange(n, dtype=np.int64)
    return RecordLayout(offsets, np.full(n, reclen, dtype=np.int64), pick("samples")[:n])


def _plausible(year: np.ndarray, day: np.ndarray) -> np.ndarray:
    return (year >= 1900) & (year <= 2100) & (day >= 1) & (day <= 366)


def _walk(raw: bytes, base: int, start: int) -> RecordLayout:
    """The exact walk from byte ``start`` of ``raw``, one record at a time (see
    :func:`record_layout`)."""
    offsets, lengths, samples = [], [], []
    end = len(raw)
    off = start
    while off < end:
        rest = end - off
        where = base + off
        if rest < FIXED_HEADER_BYTES:
            raise RecordError(where, f"is cut short: {rest} bytes remain, fewer than the "
                                     f"{FIXED_HEADER_BYTES}-byte fixed header")
        head = raw[off: off + FIXED_HEADER_BYTES]
        if is_noise_record(head):
            off = _next_record(raw, off)
            continue
        order, why = fixed_header_order(head)
        if order is None:
            raise RecordError(where, f"does not open with a SEED fixed header ({why})")
        reclen = _blockette_1000_length(raw, off, order, where)
        if reclen is None:
            reclen = _next_record(raw, off) - off
            if reclen & (reclen - 1) or not MIN_RECORD_BYTES <= reclen <= MAX_RECORD_BYTES:
                raise RecordError(where, f"has no blockette 1000, and its {reclen} bytes up to the next "
                                         "record or the end are not a power-of-two record length")
        if reclen > rest:
            raise RecordError(where, f"is cut short: its blockette 1000 declares {reclen} bytes, "
                                     f"{rest} remain")
        offsets.append(where)
        lengths.append(reclen)
        samples.append(struct.unpack_from(order + "H", raw, off + 30)[0])
        off += reclen
    return RecordLayout(np.asarray(offsets, dtype=np.int64), np.asarray(lengths, dtype=np.int64),
                        np.asarray(samples, dtype=np.int64))


def _blockette_1000_length(raw: bytes, off: int, order: str, where: int) -> int | None:
    """Record length from blockette 1000 of the record at ``off``, or None when the chain ends
    without one. Each blockette must lie after the fixed header, after the one before it, and
    inside the bytes."""
    end = len(raw)
    at, = struct.unpack_from(order + "H", raw, off + 46)
    previous = None
    while at:
        if at < (FIXED_HEADER_BYTES if previous is None else previous + 4):
            after = "inside the fixed header" if previous is None else f"not after the one at byte {previous}"
            raise RecordError(where, f"has a broken blockette chain (a blockette at byte {at} of the "
                                     f"record, {after})")
        if off + at + 4 > end:
            raise RecordError(where, f"is cut short inside its blockette chain (a blockette at byte {at} "
                                     f"of the record, {end - off} bytes remain)")
        kind, following = struct.unpack_from(order + "HH", raw, off + at)
        if kind == BLOCKETTE_1000:
            if off + at + 8 > end:
                raise RecordError(where, "is cut short inside its blockette 1000")
            exponent = raw[off + at + 6]
            if not MIN_RECORD_BYTES <= 1 << min(exponent, 63) <= MAX_RECORD_BYTES:
                raise RecordError(where, f"declares a record length of 2^{exponent} bytes in blockette "
                                         f"1000 (read: 2^7 to 2^20)")
            reclen = 1 << exponent
            if at + 8 > reclen:
                raise RecordError(where, f"has blockette 1000 at byte {at}, beyond its own "
                                         f"{reclen}-byte length")
            return reclen
        previous, at = at, following
    return None


def _next_record(raw: bytes, off: int) -> int:
    """Offset of the next valid fixed header or noise record after ``off``, searched at 128-byte
    steps (libmseed's search for a record without blockette 1000), or the end of ``raw``."""
    end = len(raw)
    for at in range(off + MIN_RECORD_BYTES, end - FIXED_HEADER_BYTES + 1, MIN_RECORD_BYTES):
        head = raw[at: at + FIXED_HEADER_BYTES]
        if is_noise_record(head) or fixed_header_order(head)[0] is not None:
            return at
    return end
