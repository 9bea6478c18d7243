"""HDF5 store: crash-safe, SWMR-readable segment files written by one thread from a bounded queue.

Acquisition hands engineering blocks to `Store.submit`, which never blocks: it appends to an
in-memory queue bounded in bytes (`queue_mb`) and returns False, counting the block and raising a
`storage_drop` event, when the queue is full. One writer thread owns the h5py file. It wakes on the
flush timer (`flush_interval_s`), or earlier when the queue holds min(queue_mb/4, 16 MiB) or a
new segment / stop is asked for, takes everything queued, coalesces the blocks of each device into
one append per dataset (one `set_extent` and one `write` on the dataset id; at most ~4 MiB per
append), and flushes once per interval when something was written, never per block. Files are
opened with libver='latest' and switched to SWMR mode once every object exists, so readers can
open a segment with `h5py.File(path, 'r', swmr=True)` while it is written, and a kill -9 loses at
most about one flush interval of data and never the file.

Segments
--------
File name `<station>_<YYYYmmddTHHMMSSZ>.h5` from the UTC time of the segment's first sample
(`-1`, `-2` ... appended if the name is taken; characters other than letters, digits, `.`, `_`
and `-` in the station id become `_`). A new segment begins

* at every `Store.start()` (an old file is never appended to),
* when a block reaches a segment boundary: boundaries are UTC midnight and every `segment_hours`
  after it within the day (for `segment_hours` > 24: multiples of it since 1970-01-01T00:00Z).
  A block that spans the boundary is split there: the samples before it end the old segment and
  the rest begin the new one (both parts keep the block's seq; the second part's start_index and
  t0_ns are advanced). Blocks of other devices that still hold earlier samples go to the new
  segment: a closed segment is never reopened for writing,
* when the next block would take the file past `segment_max_mb` (never for an empty segment; the
  cap is approximate: chunk allocation can take a file about one chunk per dataset past it),
* when a device's sample times would go backwards (its driver re-anchored after the wall clock
  stepped back): times within one segment always increase,
* on `Store.new_segment()` (configuration reload, channel set change), after everything queued,
* after three failed write attempts in a row, unless the disk is full or read-only (the faulty
  file is given up, see "Write errors").

A segment is created under `<name>.h5.tmp`, built, switched to SWMR mode, flushed and only then
given its `.h5` name, so every `*.h5` file is complete. While open, the writer holds a Linux open
file description lock (fcntl F_OFD_SETLK, write lock on the single byte at offset 2**62, beyond any
data) so `recover_unclosed` can tell a live writer from a killed one (HDF5 drops its own flock
when SWMR writing starts). A segment with no blocks yet opens for pending events at a flush, named
from the wall clock. Stale `*.h5.tmp` files (a writer killed while creating one) are removed by
`Store.start()`.

Threads: `submit`, `record_event`, `new_segment`, `stop` and `status` may be called from any
thread (blocks submitted before `start` are queued). `on_event` is called from the submitting
thread for `storage_drop` and from the writer thread for the others; it must not block. The store
writes its own events to `/events` itself; handing them back through `record_event` is a no-op.

Layout of one segment file
--------------------------
| Path                             | Type                            | Content                     |
|----------------------------------|---------------------------------|-----------------------------|
| `/` (attributes)                 | see "Root attributes"           | file identity               |
| `/config`                        | scalar variable-length UTF-8    | configuration text in force |
| `/devices/<dev>` (attributes)    | see "Device attributes"         | device identity             |
| `/devices/<dev>/time_ns`         | (N,) int64                      | UTC sample times, ns        |
| `/devices/<dev>/raw`             | (N, n_raw) int32 or float64 [1] | values as delivered         |
| `/devices/<dev>/value`           | (N, k) float64 or float32 [2]   | engineering values [5]      |
| `/devices/<dev>/quality`         | (N, k) uint8                    | Quality bits (block.py)     |
| `/devices/<dev>/blocks`          | (B,) compound [3]               | one row per stored block    |
| `/devices/<dev>/channels/<chan>` | empty group, attributes         | per-channel metadata        |
| `/events`                        | (E,) compound [4]               | events, in order            |

[1] DeviceLayout.raw_dtype. [2] storage.value_dtype. [3] all int64: row, start_index, seq, t0_ns,
host_mono_ns, host_wall_ns, n. [4] time_ns int64, kind S32, device S64, channel S64, origin S32,
detail S2048 (JSON), part uint32, parts uint32. [5] NaN where unusable.

Root attributes: format_version (int, `straind.FORMAT_VERSION`), straind_version, station_id,
created_utc (ISO 8601 with microseconds and Z), host (writer host name), start_reason (start,
time, size, time_step, new_segment, write_error), previous_segment (file name of the segment before it in
the same run, or ""), segment_end_utc (the time boundary that ends it).

Device attributes: every key of DeviceLayout.attrs, then (winning on a clash) driver,
sample_rate_hz, period_ns, raw_dtype, n_raw, value_dtype, compression, chunk_rows, columns and
units (string arrays in column order). Channel group attributes: every key of
ChannelLayout.attrs, then column, quantity, unit, measured.

`blocks` rows: row = first data row of the block in this file, start_index = the device's sample
counter of that row, seq = driver block sequence, t0_ns = UTC time of that row, host_mono_ns /
host_wall_ns = host clocks when the block arrived, n = rows stored.

Events: SWMR cannot append variable-length strings safely, so the text fields are fixed-length
UTF-8 bytes. An event whose text does not fit takes `parts` consecutive rows (part = 0 .. parts-1,
all with the same time_ns); field f of the event is the concatenation of field f over its rows
(split at byte boundaries, so join the bytes before decoding). Nothing is truncated. `read_events`
reassembles them. Store events: `storage_drop` (detail run = begin | end, reason, counts and seq /
t0 range of the dropped blocks), `storage_fault`, `storage_recovered`.

Chunks and compression: data chunks hold `chunk_rows` rows: one second of samples, at least 1024,
rounded up to a multiple of 1024, and reduced (not below 1024) so that one chunk of the widest
dataset stays within 4 MiB; the chunk cache per dataset is sized to hold two such chunks. With
compression `lzf` or `gzip` (level 4) the integer datasets time_ns, raw and quality get the
shuffle filter and that compressor; `value` (noisy floats, which hardly compress) and the small
tables are stored plain.

Live readers: the writer extends raw, value, quality, then time_ns, then blocks. Datasets are
refreshed one by one, so a live reader should take `min(len)` over the datasets of a device.

Durability: with `fsync` (default true) every flush is followed by fsync(2) of the file and every
new segment name by fsync of the directory, so a power cut, like a kill -9, loses at most about
one flush interval. An fsync error counts as a write error (the kernel may have dropped the
pages: the rows since the last good flush are written again, see below).

Write errors: any exception from HDF5 (OSError such as ENOSPC) is counted, reported once per fault
episode as a `storage_fault` event (and whenever the error text changes), and the unwritten blocks
are kept in memory (still counted against `queue_mb`, so new blocks are dropped, counted and
reported once that is full) and retried with back-off (one flush interval, doubling, at most 5 s).
Datasets are cut back to their last complete row after a failed append, so no file holds a
partial row. A full or read-only file system (ENOSPC, EDQUOT, EROFS, found in the error's errno
or in HDF5's message) keeps the open segment: HDF5 keeps its unwritten metadata and the retry
writes it once space returns, so the file stays whole. After three failures in a row of any
other kind the segment is closed as far as possible and the next attempt opens a new one; when
HDF5 cannot close it, its objects are kept (never freed: freeing the objects of a file whose
close failed crashes the library) and the file is closed at exit or recovered at the next
start. The first successful write and flush afterwards raises `storage_recovered`.

Crash recovery: a killed writer leaves the superblock's consistency flags set, and plain
`h5py.File(p, 'r')` refuses such a file. `recover_unclosed(directory)` clears them for files no
live writer holds. Superblock version 2/3 (libver latest), at offset 0 or at 512, 1024, 2048 ...
after a user block: signature (8 bytes), version (1), size of offsets O (1), size of lengths (1),
consistency flags (1), base address, extension address, end-of-file address, root object header
address (O bytes each, little-endian), checksum (4 bytes: Jenkins lookup3 hashlittle with initval
0 over all preceding superblock bytes). A file shorter than its recorded end-of-file address is
extended with zeros to it (space that was allocated but not yet written when the writer died).
"""

from __future__ import annotations

import collections
import errno
import fcntl
import json
import logging
import math
import os
import re
import socket
import struct
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import h5py
import numpy as np
from h5py import h5s

from . import FORMAT_VERSION, __version__
from .block import EngineeringBlock
from .events import Event
from .layout import DeviceLayout

__all__ = [
    "Store", "is_unclosed", "recover_unclosed", "read_events", "segment_end_ns",
    "segment_file_stem", "lookup3_hashlittle", "EVENT_DTYPE", "BLOCKS_DTYPE", "EVENT_FIELD_BYTES",
    "LIVE_LOCK_OFFSET",
]

log = logging.getLogger("straind.store")

#: Byte sizes of the fixed-length text fields of one `/events` row.
EVENT_FIELD_BYTES: Mapping[str, int] = {"kind": 32, "device": 64, "channel": 64, "origin": 32,
                                        "detail": 2048}

EVENT_DTYPE = np.dtype([("time_ns", "<i8")]
                       + [(name, f"S{size}") for name, size in EVENT_FIELD_BYTES.items()]
                       + [("part", "<u4"), ("parts", "<u4")])

BLOCKS_DTYPE = np.dtype([("row", "<i8"), ("start_index", "<i8"), ("seq", "<i8"), ("t0_ns", "<i8"),
                         ("host_mono_ns", "<i8"), ("host_wall_ns", "<i8"), ("n", "<i8")])

#: Offset of the one-byte record lock a live writer holds on its open segment.
LIVE_LOCK_OFFSET = 1 << 62

_DAY_NS = 86_400 * 10**9
_HOUR_NS = 3_600 * 10**9
_MAX_CHUNK_BYTES = 4 << 20
_MAX_APPEND_BYTES = 4 << 20   # rows per coalesced append are capped near this many bytes
_EVENT_CHUNK_ROWS = 64
_BLOCKS_CHUNK_ROWS = 256
_ABANDON_AFTER = 3          # consecutive failed attempts before a faulty segment is given up
#: errno values of a full or read-only file system: wait for it, never give the file up
_TRANSIENT_ERRNOS = frozenset({errno.ENOSPC, errno.EDQUOT, errno.EROFS})
_ERRNO_IN_TEXT = re.compile(r"errno = (\d+)")
_MAX_RETRY_S = 5.0
_MAX_QUEUED_EVENTS = 100_000
_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
_F_OFD_SETLK = getattr(fcntl, "F_OFD_SETLK", fcntl.F_SETLK)
_F_OFD_GETLK = getattr(fcntl, "F_OFD_GETLK", fcntl.F_GETLK)
_FLOCK_FMT = "hhqqi4x"      # struct flock on Linux: l_type, l_whence, l_start, l_len, l_pid


# --------------------------------------------------------------------------------------------
# Pure helpers
# --------------------------------------------------------------------------------------------

def segment_end_ns(t_ns: int, segment_hours: float) -> int:
    """UTC time (ns) of the first segment boundary after t_ns.

    Boundaries are UTC midnight and every segment_hours after it within the day; for periods
    longer than a day, multiples of the period since 1970-01-01T00:00Z.
    """
    period_ns = int(round(segment_hours * _HOUR_NS))
    if period_ns <= 0:
        raise ValueError("segment_hours must be > 0")
    t_ns = int(t_ns)
    if period_ns > _DAY_NS:
        return (t_ns // period_ns + 1) * period_ns
    day0 = (t_ns // _DAY_NS) * _DAY_NS
    return min(day0 + ((t_ns - day0) // period_ns + 1) * period_ns, day0 + _DAY_NS)


def _utc_parts(t_ns: int) -> tuple[time.struct_time, int]:
    secs, rem_ns = divmod(int(t_ns), 10**9)
    return time.gmtime(secs), rem_ns // 1000


def _iso_utc(t_ns: int) -> str:
    """ISO 8601 UTC text with microseconds and a Z."""
    tm, us = _utc_parts(t_ns)
    return time.strftime("%Y-%m-%dT%H:%M:%S", tm) + f".{us:06d}Z"


def segment_file_stem(station_id: str, first_ns: int) -> str:
    """`<station>_<YYYYmmddTHHMMSSZ>` for a segment whose first sample is at first_ns (UTC ns)."""
    station = re.sub(r"[^A-Za-z0-9._-]", "_", station_id) or "station"
    tm, _ = _utc_parts(first_ns)
    return f"{station}_{time.strftime('%Y%m%dT%H%M%SZ', tm)}"


def _rot(x: int, k: int) -> int:
    return ((x << k) | (x >> (32 - k))) & 0xFFFFFFFF


def lookup3_hashlittle(data: bytes, initval: int = 0) -> int:
    """Bob Jenkins' lookup3 `hashlittle` (byte-wise form), the checksum HDF5 puts on metadata."""
    m = 0xFFFFFFFF
    length = len(data)
    a = b = c = (0xDEADBEEF + length + initval) & m
    i = 0
    while length - i > 12:
        a = (a + int.from_bytes(data[i:i + 4], "little")) & m
        b = (b + int.from_bytes(data[i + 4:i + 8], "little")) & m
        c = (c + int.from_bytes(data[i + 8:i + 12], "little")) & m
        # mix(a, b, c)
        a = (a - c) & m; a ^= _rot(c, 4); c = (c + b) & m
        b = (b - a) & m; b ^= _rot(a, 6); a = (a + c) & m
        c = (c - b) & m; c ^= _rot(b, 8); b = (b + a) & m
        a = (a - c) & m; a ^= _rot(c, 16); c = (c + b) & m
        b = (b - a) & m; b ^= _rot(a, 19); a = (a + c) & m
        c = (c - b) & m; c ^= _rot(b, 4); b = (b + a) & m
        i += 12
    tail = data[i:]
    if not tail:
        return c
    tail = tail + bytes(12 - len(tail))
    a = (a + int.from_bytes(tail[0:4], "little")) & m
    b = (b + int.from_bytes(tail[4:8], "little")) & m
    c = (c + int.from_bytes(tail[8:12], "little")) & m
    # final(a, b, c)
    c ^= b; c = (c - _rot(b, 14)) & m
    a ^= c; a = (a - _rot(c, 11)) & m
    b ^= a; b = (b - _rot(a, 25)) & m
    c ^= b; c = (c - _rot(b, 16)) & m
    a ^= c; a = (a - _rot(c, 4)) & m
    b ^= a; b = (b - _rot(a, 14)) & m
    c ^= b; c = (c - _rot(b, 24)) & m
    return c


def _encode_event(ev: Event) -> np.ndarray:
    """The `/events` rows of one event (continuation rows when a text field does not fit)."""
    texts = {"kind": ev.kind, "device": ev.device, "channel": ev.channel, "origin": ev.origin,
             "detail": ev.detail_json()}
    raw = {name: str(text).encode("utf-8") for name, text in texts.items()}
    parts = max(1, max(math.ceil(len(raw[n]) / EVENT_FIELD_BYTES[n]) for n in raw))
    rows = np.zeros(parts, dtype=EVENT_DTYPE)
    rows["time_ns"] = int(ev.time_ns)
    rows["part"] = np.arange(parts, dtype=np.uint32)
    rows["parts"] = parts
    for name, data in raw.items():
        size = EVENT_FIELD_BYTES[name]
        for r in range(math.ceil(len(data) / size)):
            rows[name][r] = data[r * size:(r + 1) * size]
    return rows


def read_events(h5: h5py.File | h5py.Group) -> list[Event]:
    """All events of a segment, continuation rows joined back into one Event each."""
    table = h5["events"][...]
    events: list[Event] = []
    i = 0
    while i < len(table):
        parts = max(1, int(table["parts"][i]))
        rows = table[i:i + parts]
        text = {name: b"".join(bytes(v) for v in rows[name]).decode("utf-8")
                for name in EVENT_FIELD_BYTES}
        detail = json.loads(text["detail"]) if text["detail"] else {}
        events.append(Event(int(rows["time_ns"][0]), text["kind"], text["device"],
                            text["channel"], detail, text["origin"]))
        i += parts
    return events


def _attr_value(value: Any) -> Any:
    """A value h5py stores as an attribute (layout attrs are str/int/float/bool by contract)."""
    if value is None:
        return ""
    if isinstance(value, (bool, int, float, str, np.generic)):
        return value
    if isinstance(value, (list, tuple)) and all(isinstance(v, (int, float)) for v in value):
        return np.asarray(value)
    return str(value)


def _chunk_rows(layout: DeviceLayout, value_itemsize: int) -> int:
    """Rows per chunk: one second of samples, >= 1024, multiple of 1024, widest chunk <= 4 MiB."""
    rows = max(1024, int(math.ceil(layout.sample_rate_hz)))
    rows = int(math.ceil(rows / 1024)) * 1024
    raw_itemsize = np.dtype(layout.raw_dtype).itemsize
    widest = max(8, layout.n_raw * raw_itemsize, len(layout.channels) * value_itemsize)
    fit = (_MAX_CHUNK_BYTES // widest) // 1024 * 1024
    return max(1024, min(rows, fit))


def _check_name(name: str, what: str) -> None:
    if not name or "/" in name or name in (".", ".."):
        raise ValueError(f"{what} name {name!r} cannot be an HDF5 group name")


def _check_layouts(devices: Sequence[DeviceLayout]) -> dict[str, DeviceLayout]:
    out: dict[str, DeviceLayout] = {}
    for d in devices:
        _check_name(d.name, "device")
        if d.name in out:
            raise ValueError(f"device {d.name!r} given twice")
        if d.raw_dtype not in ("int32", "float64"):
            raise ValueError(f"device {d.name!r}: raw_dtype must be int32 or float64")
        if d.n_raw < 1 or len(d.channels) < 1:
            raise ValueError(f"device {d.name!r}: needs at least one raw column and one channel")
        if not d.sample_rate_hz > 0:
            raise ValueError(f"device {d.name!r}: sample_rate_hz must be > 0")
        seen = set()
        for c in d.channels:
            _check_name(c.name, f"device {d.name!r}: channel")
            if c.name in seen:
                raise ValueError(f"device {d.name!r}: channel {c.name!r} given twice")
            seen.add(c.name)
        out[d.name] = d
    return out


def _append_rows(ds: h5py.Dataset, start: int, arr: np.ndarray) -> None:
    """Extend ds to start + len(arr) rows and write arr there: one set_extent, one write."""
    ds.id.set_extent((start + arr.shape[0],) + arr.shape[1:])
    fspace = ds.id.get_space()
    fspace.select_hyperslab((start,) + (0,) * (arr.ndim - 1), arr.shape)
    ds.id.write(h5s.create_simple(arr.shape), fspace, arr)


def _storage_full_or_read_only(exc: BaseException) -> bool:
    """True for ENOSPC / EDQUOT / EROFS, given as errno or inside HDF5's error text."""
    if getattr(exc, "errno", None) in _TRANSIENT_ERRNOS:
        return True
    return any(int(m) in _TRANSIENT_ERRNOS for m in _ERRNO_IN_TEXT.findall(str(exc)))


def _set_rows(ds: h5py.Dataset, rows: int) -> None:
    ds.id.set_extent((rows,) + ds.shape[1:])


# --------------------------------------------------------------------------------------------
# File locks and superblock
# --------------------------------------------------------------------------------------------

def _flock_struct(kind: int) -> bytes:
    return struct.pack(_FLOCK_FMT, kind, os.SEEK_SET, LIVE_LOCK_OFFSET, 1, 0)


def _take_live_lock(path: Path) -> int | None:
    """Open path and hold the writer's record lock on it; returns the fd (None if not possible)."""
    try:
        fd = os.open(path, os.O_RDWR | os.O_CLOEXEC)
    except OSError:
        return None
    try:
        fcntl.fcntl(fd, _F_OFD_SETLK, _flock_struct(fcntl.F_WRLCK))
    except OSError as exc:
        log.warning("cannot lock %s for writing: %s", path, exc)
    return fd


def _live_lock_held(fd: int) -> bool:
    """True when some open file description holds the writer's record lock on this file."""
    try:
        res = fcntl.fcntl(fd, _F_OFD_GETLK, _flock_struct(fcntl.F_WRLCK))
    except OSError:
        return True           # cannot tell: assume live
    return struct.unpack(_FLOCK_FMT, res)[0] != fcntl.F_UNLCK


@dataclass(frozen=True)
class _Superblock:
    offset: int          # file offset of the signature
    version: int
    size_of_offsets: int
    flags: int
    eof_addr: int        # absolute end-of-file address (base address + recorded end of file)
    raw: bytes           # the superblock bytes before the checksum


def _read_superblock(fd: int) -> _Superblock | None:
    size = os.fstat(fd).st_size
    offset = 0
    while offset + 48 <= size:
        head = os.pread(fd, 12, offset)
        if head[:8] == _HDF5_SIGNATURE:
            version, so = head[8], head[9]
            if version not in (2, 3) or so not in (2, 4, 8):
                return _Superblock(offset, version, so, 0, 0, b"")
            n = 12 + 4 * so
            raw = os.pread(fd, n, offset)
            base = int.from_bytes(raw[12:12 + so], "little")
            eof = int.from_bytes(raw[12 + 2 * so:12 + 3 * so], "little")
            return _Superblock(offset, version, so, raw[11], base + eof, raw)
        offset = 512 if offset == 0 else offset * 2
    return None


def is_unclosed(path: str | os.PathLike[str]) -> bool:
    """True when the file's superblock still has its consistency flags set.

    That is the state of a file a writer has open right now, or had open when it was killed.
    Files that are not HDF5, or use superblock version 0/1, give False.
    """
    try:
        fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC)
    except OSError:
        return False
    try:
        sb = _read_superblock(fd)
    finally:
        os.close(fd)
    return bool(sb and sb.version in (2, 3) and sb.flags)


def _recover_one(path: Path) -> bool:
    """Clear the consistency flags of one file if no live writer holds it; True when fixed."""
    fd = os.open(path, os.O_RDWR | os.O_CLOEXEC)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)   # a non-SWMR HDF5 writer holds LOCK_EX
        except BlockingIOError:
            return False
        if _live_lock_held(fd):
            return False
        sb = _read_superblock(fd)
        if not (sb and sb.version in (2, 3) and sb.flags):
            return False
        old_size = os.fstat(fd).st_size
        old_sb = os.pread(fd, len(sb.raw) + 4, sb.offset)
        new = bytearray(sb.raw)
        new[11] = 0
        new += lookup3_hashlittle(bytes(new)).to_bytes(4, "little")
        if old_size < sb.eof_addr:
            os.ftruncate(fd, sb.eof_addr)
        os.pwrite(fd, bytes(new), sb.offset)
        os.fsync(fd)
        try:
            with h5py.File(path, "r", locking=False):
                pass
        except Exception as exc:  # noqa: BLE001 - any failure: put the file back as it was
            log.error("%s does not open after clearing its flags (%s); left unchanged", path, exc)
            os.pwrite(fd, old_sb, sb.offset)
            os.ftruncate(fd, old_size)
            os.fsync(fd)
            return False
        return True
    finally:
        os.close(fd)   # also releases the flock


def recover_unclosed(directory: str | os.PathLike[str]) -> list[Path]:
    """Clear the consistency flags of `*.h5` files left open by a killed writer.

    Files a live writer holds (our record lock, or an HDF5 lock) are not touched. After this,
    plain `h5py.File(p, 'r')` opens the returned files again. `directory` may also be one file.
    """
    root = Path(directory)
    paths = [root] if root.is_file() else sorted(root.glob("*.h5"))
    fixed: list[Path] = []
    for p in paths:
        try:
            if is_unclosed(p) and _recover_one(p):
                log.info("cleared the open-for-write flags of %s", p)
                fixed.append(p)
        except OSError as exc:
            log.error("cannot recover %s: %s", p, exc)
    return fixed


# --------------------------------------------------------------------------------------------
# The store
# --------------------------------------------------------------------------------------------

@dataclass
class _Piece:
    """Rows lo:hi of one engineering block (a whole block unless split at a segment boundary)."""

    block: EngineeringBlock
    lo: int
    hi: int
    mem_bytes: int          # share of the block's bytes counted against queue_mb
    last: bool              # holds the block's last row (the block counts as written after it)
    written: bool = False   # appended once already (a rewrite after a failed flush counts nothing)

    @property
    def n(self) -> int:
        return self.hi - self.lo

    @property
    def t0_ns(self) -> int:
        return self.block.t0_ns + self.lo * self.block.period_ns

    def t_last_ns(self) -> int:
        return self.t0_ns + (self.n - 1) * self.block.period_ns

    def split(self, k: int) -> tuple["_Piece", "_Piece"]:
        head_bytes = self.mem_bytes * k // self.n
        return (_Piece(self.block, self.lo, self.lo + k, head_bytes, False),
                _Piece(self.block, self.lo + k, self.hi, self.mem_bytes - head_bytes, self.last))


@dataclass
class _DeviceSets:
    layout: DeviceLayout
    time_ns: h5py.Dataset
    raw: h5py.Dataset
    value: h5py.Dataset
    quality: h5py.Dataset
    blocks: h5py.Dataset
    row_bytes: int
    rows: int = 0
    block_rows: int = 0


@dataclass
class _Segment:
    path: Path
    f: h5py.File
    lock_fd: int | None
    devices: dict[str, _DeviceSets]
    events: h5py.Dataset
    end_ns: int
    event_rows: int = 0
    dirty: bool = False
    last_t_ns: dict[str, int] = field(default_factory=dict)   # last sample time per device


@dataclass
class _DropRun:
    reason: str
    first_seq: int
    first_t0_ns: int | None
    last_seq: int = 0
    last_t0_ns: int | None = None
    blocks: int = 0
    rows: int = 0


@dataclass
class _Counters:
    rows: dict[str, int] = field(default_factory=dict)
    rows_total: dict[str, int] = field(default_factory=dict)
    flushed_rows: dict[str, int] = field(default_factory=dict)
    queued_blocks: int = 0
    queued_bytes: int = 0
    queued_events: int = 0
    dropped_blocks: int = 0
    dropped_rows: int = 0
    dropped_events: int = 0
    lost_blocks: int = 0
    flush_count: int = 0
    last_flush_wall_ns: int | None = None
    write_errors: int = 0
    last_error: str = ""
    faulted: bool = False
    segments_written: int = 0
    segment: str | None = None
    events_written: int = 0


class Store:
    """HDF5 sink: bounded queue in, SWMR segment files out, written by one thread."""

    def __init__(self, storage: Mapping[str, Any], station_id: str, config_text: str,
                 devices: Sequence[DeviceLayout], on_event: Callable[[Event], None] | None = None,
                 wall_clock_ns: Callable[[], int] = time.time_ns) -> None:
        self.directory = Path(storage["path"])
        self.segment_hours = float(storage.get("segment_hours", 24))
        self.segment_max_bytes = int(float(storage.get("segment_max_mb", 2048)) * 1e6)
        self.flush_interval_s = float(storage.get("flush_interval_s", 1.0))
        self.compression = str(storage.get("compression", "none"))
        self.value_dtype = np.dtype(str(storage.get("value_dtype", "float64")))
        self.queue_limit_bytes = int(float(storage.get("queue_mb", 256)) * 1e6)
        self.fsync = bool(storage.get("fsync", True))
        if self.compression not in ("none", "lzf", "gzip"):
            raise ValueError("storage.compression must be none, lzf or gzip")
        if self.value_dtype not in (np.dtype("float64"), np.dtype("float32")):
            raise ValueError("storage.value_dtype must be float64 or float32")
        if not (self.flush_interval_s > 0 and self.segment_hours > 0
                and self.segment_max_bytes > 0 and self.queue_limit_bytes > 0):
            raise ValueError("storage: flush_interval_s, segment_hours, segment_max_mb and "
                             "queue_mb must be > 0")
        segment_end_ns(0, self.segment_hours)
        self.station_id = str(station_id)
        self._on_event = on_event
        self._wall_ns = wall_clock_ns
        self._host = socket.gethostname()

        # Shared state (guarded by _lock).
        self._lock = threading.Lock()
        self._cond = threading.Condition(self._lock)
        self._queue: collections.deque[tuple] = collections.deque()
        self._submit_layouts = _check_layouts(devices)
        self._wake = False
        self._started = False
        self._stopping = False
        self._finished = False
        self._stop_deadline = 0.0
        self._drop_runs: dict[str, _DropRun] = {}
        self._own_events: collections.deque[Event] = collections.deque(maxlen=256)
        self._c = _Counters()
        self._wake_bytes = max(1, min(self.queue_limit_bytes // 4, 16 << 20))
        self._thread: threading.Thread | None = None

        # Writer state (writer thread only, after start).
        self._layouts = dict(self._submit_layouts)
        self._config_text = str(config_text)
        self._seg: _Segment | None = None
        self._inbox: collections.deque[tuple] = collections.deque()
        self._pending: dict[str, list[_Piece]] = {}
        self._pending_file_bytes = 0
        self._pending_events: list[Event] = []
        self._next_reason = "start"
        self._previous_name = ""
        self._fail_streak = 0
        self._unclosable: list[_Segment] = []
        # rows appended since the last successful flush, kept until the next one succeeds
        self._since_flush: dict[str, list[_Piece]] = {}
        self._events_since_flush: list[Event] = []
        self._flushed_at: dict[str, tuple[int, int]] = {}   # device -> (rows, block rows)
        self._flushed_event_rows = 0
        self._rewind_needed = False
        self._fault_since = 0.0
        self._fault_errors = 0
        self._retry_at = 0.0
        self._next_flush = 0.0

    # ---------------------------------------------------------------- public API (any thread)

    def start(self) -> None:
        """Create the directory, remove stale `*.h5.tmp` leftovers, start the writer thread."""
        with self._lock:
            if self._started:
                raise RuntimeError("Store already started")
            self._started = True
        self.directory.mkdir(parents=True, exist_ok=True)
        for tmp in self.directory.glob("*.h5.tmp"):
            self._remove_stale_tmp(tmp)
        self._next_flush = time.monotonic() + self.flush_interval_s
        self._thread = threading.Thread(target=self._run, name="straind-store", daemon=False)
        self._thread.start()

    def submit(self, block: EngineeringBlock) -> bool:
        """Queue a block for writing; never blocks. False (counted, event raised) if not taken."""
        raw = block.raw
        n = raw.n_samples
        mem_bytes = (raw.data.nbytes + raw.quality.nbytes + block.values.nbytes
                     + block.quality.nbytes + 64)
        events: list[Event] = []
        with self._lock:
            reason = self._reject_reason(block)
            if reason is None and self._c.queued_bytes + mem_bytes > self.queue_limit_bytes:
                reason = "queue_full"
            if reason is not None:
                self._c.dropped_blocks += 1
                self._c.dropped_rows += n
                events.extend(self._note_drop_locked(block, reason))
            else:
                ended = self._drop_runs.pop(block.device, None)
                if ended is not None:
                    events.append(self._drop_run_event(block.device, ended, "end"))
                self._queue.append(("b", _Piece(block, 0, n, mem_bytes, True)))
                self._c.queued_blocks += 1
                self._c.queued_bytes += mem_bytes
                if self._c.queued_bytes >= self._wake_bytes and not self._wake:
                    self._wake = True
                    self._cond.notify()
            for ev in events:
                self._queue_own_event_locked(ev)
        for ev in events:
            self._notify(ev)
        return reason is None

    def record_event(self, event: Event) -> None:
        """Queue an event for the `/events` table, in order with the blocks; never blocks.

        Events the store raised itself (already queued) are ignored if handed back.
        """
        if not isinstance(event, Event):
            raise TypeError("record_event needs a straind.events.Event")
        with self._lock:
            if any(event is own for own in self._own_events):
                return
            if self._stopping or self._c.queued_events >= _MAX_QUEUED_EVENTS:
                self._c.dropped_events += 1
                return
            self._queue.append(("e", event))
            self._c.queued_events += 1

    def new_segment(self, devices: Sequence[DeviceLayout] | None = None,
                    config_text: str | None = None) -> None:
        """Close the current segment after what is queued; later data go to a new segment.

        devices / config_text replace the layout and configuration text for the new segment;
        blocks submitted after this call are checked against the new layout.
        """
        layouts = _check_layouts(devices) if devices is not None else None
        with self._lock:
            if layouts is not None:
                self._submit_layouts = layouts
            self._queue.append(("s", layouts, config_text))
            self._wake = True
            self._cond.notify()

    def stop(self, timeout_s: float = 10.0) -> None:
        """Write what is queued, flush, close the segment and join the writer; idempotent."""
        events: list[Event] = []
        with self._lock:
            if not self._stopping:
                self._stopping = True
                self._stop_deadline = time.monotonic() + 0.8 * timeout_s
                for device, run in self._drop_runs.items():
                    events.append(self._drop_run_event(device, run, "end"))
                self._drop_runs.clear()
                for ev in events:
                    self._queue_own_event_locked(ev)
                self._queue.append(("x",))
                self._wake = True
                self._cond.notify()
            thread = self._thread
        for ev in events:
            self._notify(ev)
        if thread is not None:
            thread.join(timeout_s)
            if thread.is_alive():
                log.warning("HDF5 writer still busy after %.1f s", timeout_s)

    def status(self) -> dict[str, Any]:
        """Counters for the status command and the watchdog (a consistent snapshot).

        segment_path (open file or None), segments_written, rows / flushed_rows (per device, in
        the open segment), rows_total (per device, since start), queue_blocks, queue_bytes
        (queued plus taken but not yet written), queue_limit_bytes, queue_events,
        dropped_blocks, dropped_rows, dropped_events, lost_blocks (unwritable at stop),
        events_written, last_flush_wall_ns, flush_count, write_errors, last_error, faulted,
        unclosable_segments (files HDF5 could not close after a storage failure), running.
        """
        with self._lock:
            c = self._c
            return {
                "segment_path": c.segment,
                "segments_written": c.segments_written,
                "rows": dict(c.rows),
                "rows_total": dict(c.rows_total),
                "flushed_rows": dict(c.flushed_rows),
                "queue_blocks": c.queued_blocks,
                "queue_bytes": c.queued_bytes,
                "queue_limit_bytes": self.queue_limit_bytes,
                "queue_events": c.queued_events,
                "dropped_blocks": c.dropped_blocks,
                "dropped_rows": c.dropped_rows,
                "dropped_events": c.dropped_events,
                "lost_blocks": c.lost_blocks,
                "events_written": c.events_written,
                "last_flush_wall_ns": c.last_flush_wall_ns,
                "flush_count": c.flush_count,
                "write_errors": c.write_errors,
                "last_error": c.last_error,
                "faulted": c.faulted,
                "unclosable_segments": len(self._unclosable),
                "running": bool(self._thread is not None and self._thread.is_alive()),
            }

    # ---------------------------------------------------------------- submit-side helpers

    def _reject_reason(self, block: EngineeringBlock) -> str | None:
        if self._stopping:
            return "stopped"
        layout = self._submit_layouts.get(block.device)
        if layout is None:
            return "unknown_device"
        raw = block.raw
        n, k = raw.n_samples, len(layout.channels)
        if raw.t0_ns is None or raw.period_ns <= 0 or n == 0:
            return "no_time" if raw.t0_ns is None else "empty_or_bad_period"
        if (raw.data.ndim != 2 or raw.data.shape[1] != layout.n_raw
                or block.values.shape != (n, k) or block.quality.shape != (n, k)):
            return "shape_mismatch"
        if layout.raw_dtype == "int32" and raw.data.dtype.kind not in "iu":
            return "raw_dtype_mismatch"
        return None

    def _note_drop_locked(self, block: EngineeringBlock, reason: str) -> list[Event]:
        raw = block.raw
        run = self._drop_runs.get(block.device)
        out: list[Event] = []
        if run is not None and run.reason != reason:
            out.append(self._drop_run_event(block.device, run, "end"))
            run = None
        if run is None:
            run = _DropRun(reason, raw.seq, raw.t0_ns)
            self._drop_runs[block.device] = run
            out.append(Event(self._wall_ns(), "storage_drop", block.device, "",
                             {"run": "begin", "reason": reason, "seq": raw.seq,
                              "t0_ns": raw.t0_ns, "rows": raw.n_samples,
                              "dropped_blocks_total": self._c.dropped_blocks}, "service"))
        run.blocks += 1
        run.rows += raw.n_samples
        run.last_seq = raw.seq
        run.last_t0_ns = raw.t0_ns
        return out

    def _drop_run_event(self, device: str, run: _DropRun, phase: str) -> Event:
        return Event(self._wall_ns(), "storage_drop", device, "",
                     {"run": phase, "reason": run.reason, "blocks": run.blocks, "rows": run.rows,
                      "first_seq": run.first_seq, "last_seq": run.last_seq,
                      "first_t0_ns": run.first_t0_ns, "last_t0_ns": run.last_t0_ns,
                      "dropped_blocks_total": self._c.dropped_blocks}, "service")

    def _queue_own_event_locked(self, ev: Event) -> None:
        self._own_events.append(ev)
        if not self._finished:
            self._queue.append(("e", ev))
            self._c.queued_events += 1

    def _notify(self, ev: Event) -> None:
        if self._on_event is None:
            return
        try:
            self._on_event(ev)
        except Exception:  # noqa: BLE001 - a listener must not break the store
            log.exception("on_event listener failed for %s", ev.kind)

    def _remove_stale_tmp(self, tmp: Path) -> None:
        try:
            fd = os.open(tmp, os.O_RDWR | os.O_CLOEXEC)
        except OSError:
            return
        try:
            if not _live_lock_held(fd):
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                tmp.unlink()
                log.info("removed unfinished segment %s", tmp)
        except OSError:
            pass
        finally:
            os.close(fd)

    # ---------------------------------------------------------------- writer thread

    def _raise_fault_event(self, kind: str, detail: dict[str, Any]) -> None:
        ev = Event(self._wall_ns(), kind, "", "", detail, "service")
        with self._lock:
            self._own_events.append(ev)
            self._c.queued_events += 1
        self._pending_events.append(ev)
        self._notify(ev)

    def _run(self) -> None:
        while True:
            with self._cond:
                while True:
                    now = time.monotonic()
                    if self._c.faulted:
                        until = self._retry_at
                        if self._stopping:
                            until = min(until, self._stop_deadline)
                        if now >= until:
                            break
                    else:
                        if self._wake or self._stopping or now >= self._next_flush:
                            break
                        until = self._next_flush
                    self._cond.wait(until - now)
                self._wake = False
                if not self._c.faulted or self._stopping:
                    self._inbox.extend(self._queue)
                    self._queue.clear()
                stopping = self._stopping
            try:
                ok = self._work()
                if ok and (self._c.faulted or stopping or time.monotonic() >= self._next_flush):
                    self._flush()
            except Exception as exc:  # noqa: BLE001 - the writer must survive anything
                log.exception("HDF5 writer error")
                self._fault(exc, "writer")
            if stopping:
                if not self._c.faulted or time.monotonic() >= self._stop_deadline:
                    break
        self._finish()

    def _finish(self) -> None:
        """After stop: give up what could not be written, close the segment."""
        if self._rewind_needed and self._seg is not None:
            try:   # no row after the last good flush stays in the file unless written again
                self._rewind()
            except Exception:  # noqa: BLE001
                log.error("could not cut %s back to its last flush", self._seg.path)
        lost_pieces = [p for ps in self._pending.values() for p in ps]
        lost_pieces += [it[1] for it in self._inbox if it[0] == "b"]
        lost = sum(1 for p in lost_pieces if p.last)
        if lost_pieces:
            ev = Event(self._wall_ns(), "storage_fault", "", "",
                       {"where": "stop", "lost_blocks": lost,
                        "lost_rows": sum(p.n for p in lost_pieces),
                        "error": self._c.last_error}, "service")
            self._notify(ev)
            log.error("HDF5 store stopped with %d blocks unwritten", lost)
        with self._lock:
            self._c.lost_blocks += lost
            self._c.queued_blocks = 0
            self._c.queued_bytes = 0
            self._c.queued_events = 0
        self._pending.clear()
        self._pending_events.clear()
        self._inbox.clear()
        with self._lock:
            self._finished = True
            self._queue.clear()
        if self._seg is not None:
            try:
                self._close_segment()
            except Exception as exc:  # noqa: BLE001
                self._fault(exc, "close")
                self._abandon_segment()

    def _work(self) -> bool:
        """Write everything taken from the queue; False after a write error (state kept)."""
        try:
            self._write_pending()
            while self._inbox:
                item = self._inbox[0]
                if item[0] == "b":
                    if not self._place(item[1]):
                        continue           # segment rotated: place (the rest of) it again
                elif item[0] == "e":
                    self._pending_events.append(item[1])
                elif item[0] == "s":
                    self._write_pending()
                    if self._seg is not None:
                        self._close_segment()
                    _, layouts, config_text = item
                    if layouts is not None:
                        self._layouts = layouts
                    if config_text is not None:
                        self._config_text = str(config_text)
                    self._next_reason = "new_segment"
                self._inbox.popleft()
            self._write_pending()
        except Exception as exc:  # noqa: BLE001 - OSError from HDF5 mostly; keep data, retry
            self._fault(exc, getattr(exc, "_store_where", "write"))
            return False
        return True

    def _place(self, piece: _Piece) -> bool:
        """Route a piece to the pending appends; False when the segment had to rotate first."""
        if self._seg is None:
            self._open_segment(piece.t0_ns)
        seg = self._seg
        assert seg is not None
        last = seg.last_t_ns.get(piece.block.device)
        if last is not None and piece.t0_ns <= last:
            # the device's times went back (re-anchored after the wall clock stepped back):
            # times within a segment only increase, so this piece begins a new segment
            self._write_pending()
            self._close_segment()
            self._next_reason = "time_step"
            return False
        if piece.t_last_ns() >= seg.end_ns:
            period = piece.block.period_ns
            k = 0 if piece.t0_ns >= seg.end_ns else -((piece.t0_ns - seg.end_ns) // period)
            if k > 0:
                head, tail = piece.split(k)
                self._add_pending(head)
                self._inbox[0] = ("b", tail)
            self._write_pending()
            self._close_segment()
            self._next_reason = "time"
            return False
        file_bytes = piece.n * seg.devices[piece.block.device].row_bytes + BLOCKS_DTYPE.itemsize
        has_data = self._pending_file_bytes > 0 or any(d.rows for d in seg.devices.values())
        if has_data and (seg.f.id.get_filesize() + self._pending_file_bytes + file_bytes
                         > self.segment_max_bytes):
            self._write_pending()
            self._close_segment()
            self._next_reason = "size"
            return False
        self._add_pending(piece, file_bytes)
        return True

    def _add_pending(self, piece: _Piece, file_bytes: int | None = None) -> None:
        if file_bytes is None:
            assert self._seg is not None
            file_bytes = piece.n * self._seg.devices[piece.block.device].row_bytes
        self._pending.setdefault(piece.block.device, []).append(piece)
        self._pending_file_bytes += file_bytes
        assert self._seg is not None
        self._seg.last_t_ns[piece.block.device] = piece.t_last_ns()

    def _write_pending(self) -> None:
        """Append the pending pieces (one append per dataset per device) and events."""
        if self._rewind_needed and self._seg is not None:
            self._rewind()
        if not self._pending and not self._pending_events:
            return
        if self._seg is None:
            starts = [ps[0].t0_ns for ps in self._pending.values() if ps]
            self._open_segment(min(starts) if starts else self._wall_ns())
        seg = self._seg
        assert seg is not None
        for device in list(self._pending):
            pieces = self._pending[device]
            sets = seg.devices[device]
            cap_rows = max(1, _MAX_APPEND_BYTES // sets.row_bytes)
            while pieces:
                # at most ~4 MiB per append (whole blocks; never split here): bounds the
                # temporary copy made by the coalescing concatenate
                n_take, rows = 0, 0
                while n_take < len(pieces) and (n_take == 0 or rows + pieces[n_take].n <= cap_rows):
                    rows += pieces[n_take].n
                    n_take += 1
                self._append_device(seg, sets, pieces[:n_take])
                del pieces[:n_take]
            del self._pending[device]
        self._pending_file_bytes = 0
        if self._pending_events:
            rows = np.concatenate([_encode_event(ev) for ev in self._pending_events])
            try:
                _append_rows(seg.events, seg.event_rows, rows)
            except Exception as exc:
                self._restore(seg.events, seg.event_rows)
                exc._store_where = "append events"  # type: ignore[attr-defined]
                raise
            seg.event_rows += len(rows)
            seg.dirty = True
            rewritten = {id(ev) for ev in self._events_since_flush}
            n_ev = sum(1 for ev in self._pending_events if id(ev) not in rewritten)
            self._events_since_flush = list(self._pending_events) if not rewritten else \
                self._events_since_flush + [ev for ev in self._pending_events
                                            if id(ev) not in rewritten]
            self._pending_events.clear()
            with self._lock:
                self._c.events_written += n_ev
                self._c.queued_events = max(0, self._c.queued_events - n_ev)

    @staticmethod
    def _restore(ds: h5py.Dataset, rows: int) -> None:
        try:
            _set_rows(ds, rows)
        except Exception:  # noqa: BLE001 - best effort; the retry rewrites from `rows`
            log.debug("could not cut %s back to %d rows", ds.name, rows, exc_info=True)

    def _append_device(self, seg: _Segment, ds: _DeviceSets, pieces: list[_Piece]) -> None:
        layout = ds.layout
        raw = np.concatenate([p.block.raw.data[p.lo:p.hi] for p in pieces],
                             dtype=np.dtype(layout.raw_dtype), casting="unsafe")
        value = np.concatenate([p.block.values[p.lo:p.hi] for p in pieces],
                               dtype=self.value_dtype, casting="unsafe")
        quality = np.concatenate([p.block.quality[p.lo:p.hi] for p in pieces],
                                 dtype=np.uint8, casting="unsafe")
        times = np.concatenate([p.t0_ns + np.arange(p.n, dtype=np.int64)
                                * np.int64(p.block.period_ns) for p in pieces])
        table = np.zeros(len(pieces), dtype=BLOCKS_DTYPE)
        row = ds.rows
        for i, p in enumerate(pieces):
            b = p.block.raw
            table[i] = (row, b.start_index + p.lo, b.seq, p.t0_ns, b.host_mono_ns,
                        b.host_wall_ns, p.n)
            row += p.n
        start = ds.rows
        datasets = ((ds.raw, raw), (ds.value, value), (ds.quality, quality), (ds.time_ns, times))
        try:
            for dset, arr in datasets:
                _append_rows(dset, start, arr)
            _append_rows(ds.blocks, ds.block_rows, table)
        except Exception as exc:
            for dset, _ in datasets:
                self._restore(dset, start)
            self._restore(ds.blocks, ds.block_rows)
            exc._store_where = f"append {layout.name}"  # type: ignore[attr-defined]
            raise
        n = len(times)
        ds.rows += n
        ds.block_rows += len(pieces)
        seg.dirty = True
        name = layout.name
        new = [p for p in pieces if not p.written]
        for p in new:
            p.written = True
        self._since_flush.setdefault(name, []).extend(pieces)
        with self._lock:
            c = self._c
            c.rows[name] = ds.rows
            c.rows_total[name] = c.rows_total.get(name, 0) + sum(p.n for p in new)
            c.queued_bytes = max(0, c.queued_bytes - sum(p.mem_bytes for p in new))
            c.queued_blocks = max(0, c.queued_blocks - sum(1 for p in new if p.last))

    def _flush(self) -> None:
        seg = self._seg
        if seg is not None and seg.dirty:
            try:
                seg.f.flush()
                if self.fsync and seg.lock_fd is not None:
                    os.fsync(seg.lock_fd)       # on the medium, not only in the page cache
            except Exception as exc:  # noqa: BLE001
                self._fault(exc, "flush")
                return
            seg.dirty = False
            self._flushed(seg)
            with self._lock:
                self._c.flush_count += 1
                self._c.last_flush_wall_ns = self._wall_ns()
                self._c.flushed_rows = {n: d.rows for n, d in seg.devices.items()}
        self._next_flush = time.monotonic() + self.flush_interval_s
        if self._c.faulted:
            self._recovered()

    def _count_error(self, exc: BaseException, where: str, report: bool) -> None:
        """Count a write error; raise a storage_fault event if asked to or the error is new."""
        text = f"{where}: {exc!r}"
        changed = text != self._c.last_error
        with self._lock:
            self._c.write_errors += 1
            self._c.last_error = text
        log.error("HDF5 write error: %s", text)
        if report or changed:
            self._raise_fault_event("storage_fault", {
                "where": where, "error": repr(exc), "errno": getattr(exc, "errno", None),
                "segment": str(self._seg.path) if self._seg else None,
                "write_errors": self._c.write_errors})

    def _fault(self, exc: BaseException, where: str) -> None:
        """A failed write: keep the data, retry with back-off, give up a failing segment."""
        first = not self._c.faulted
        self._fail_streak += 1
        if self._seg is not None:
            # chunks HDF5 could not write may be gone from its cache: everything since the
            # last successful flush is written again before the next flush
            self._rewind_needed = True
        self._fault_errors += 1
        if first:
            self._fault_since = time.monotonic()
        with self._lock:
            self._c.faulted = True
        self._count_error(exc, where, report=first)
        if (self._fail_streak >= _ABANDON_AFTER and self._seg is not None
                and not _storage_full_or_read_only(exc)):
            self._abandon_segment()
        delay = min(self.flush_interval_s * 2 ** (self._fail_streak - 1), _MAX_RETRY_S)
        self._retry_at = time.monotonic() + max(delay, 0.01)

    def _recovered(self) -> None:
        detail = {"write_errors": self._fault_errors,
                  "fault_s": round(time.monotonic() - self._fault_since, 3),
                  "last_error": self._c.last_error}
        self._fail_streak = 0
        self._fault_errors = 0
        with self._lock:
            self._c.faulted = False
            self._wake = True          # take what queued up during the fault right away
        self._raise_fault_event("storage_recovered", detail)

    # ---------------------------------------------------------------- segments

    def _open_segment(self, first_ns: int) -> None:
        """Create, build and publish a new segment file whose first sample is at first_ns."""
        stem = segment_file_stem(self.station_id, first_ns)
        end_ns = segment_end_ns(first_ns, self.segment_hours)
        layouts = list(self._layouts.values())
        chunk = {d.name: _chunk_rows(d, self.value_dtype.itemsize) for d in layouts}
        biggest = max([chunk[d.name] * max(8, d.n_raw * np.dtype(d.raw_dtype).itemsize,
                                           len(d.channels) * self.value_dtype.itemsize)
                       for d in layouts] + [_EVENT_CHUNK_ROWS * EVENT_DTYPE.itemsize])
        rdcc = max(1 << 20, 2 * biggest + (64 << 10))
        tmp = self._free_tmp_path(stem)
        f = None
        lock_fd = None
        try:
            f = h5py.File(tmp, "x", libver="latest", rdcc_nbytes=rdcc, rdcc_nslots=1021,
                          rdcc_w0=1.0)
            devices = self._build(f, layouts, chunk, first_ns, end_ns)
            events = f.create_dataset("events", shape=(0,), maxshape=(None,),
                                      chunks=(_EVENT_CHUNK_ROWS,), dtype=EVENT_DTYPE)
            f.swmr_mode = True
            f.flush()
            lock_fd = _take_live_lock(tmp)
            path = self._publish(tmp, stem)
        except Exception as exc:
            if lock_fd is not None:
                os.close(lock_fd)
            if f is not None:
                try:
                    f.close()
                except Exception:  # noqa: BLE001
                    pass
            try:
                tmp.unlink()
            except OSError:
                pass
            exc._store_where = "open segment"  # type: ignore[attr-defined]
            raise
        self._seg = _Segment(path, f, lock_fd, devices, events, end_ns)
        self._previous_name = path.name
        with self._lock:
            self._c.segments_written += 1
            self._c.segment = str(path)
            self._c.rows = {d.name: 0 for d in layouts}
            self._c.flushed_rows = {d.name: 0 for d in layouts}
        log.info("opened segment %s (%s)", path, self._next_reason)

    def _free_tmp_path(self, stem: str) -> Path:
        for i in range(10_000):
            tmp = self.directory / f"{stem}{'' if i == 0 else f'-{i}'}.h5.tmp"
            if not tmp.exists():
                return tmp
        raise FileExistsError(f"no free temporary name for {stem}")

    def _publish(self, tmp: Path, stem: str) -> Path:
        """Give the finished temporary file the first free `<stem>[-i].h5` name (no clobber)."""
        for i in range(10_000):
            final = self.directory / f"{stem}{'' if i == 0 else f'-{i}'}.h5"
            try:
                os.link(tmp, final)
            except FileExistsError:
                continue
            except OSError as exc:
                if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP):
                    raise
                if final.exists():          # file system without hard links
                    continue
                os.rename(tmp, final)
                self._sync_directory()
                return final
            tmp.unlink()
            self._sync_directory()
            return final
        raise FileExistsError(f"no free segment name for {stem}")

    def _sync_directory(self) -> None:
        """Make the new name durable: a power cut must not take a published segment away."""
        if not self.fsync:
            return
        fd = os.open(self.directory, os.O_RDONLY | os.O_CLOEXEC)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)

    def _build(self, f: h5py.File, layouts: list[DeviceLayout], chunk: Mapping[str, int],
               first_ns: int, end_ns: int) -> dict[str, _DeviceSets]:
        """Every group, dataset and attribute of a segment (SWMR allows no new objects later)."""
        a = f.attrs
        a["format_version"] = FORMAT_VERSION
        a["straind_version"] = __version__
        a["station_id"] = self.station_id
        a["created_utc"] = _iso_utc(self._wall_ns())
        a["host"] = self._host
        a["start_reason"] = self._next_reason
        a["previous_segment"] = self._previous_name
        a["segment_end_utc"] = _iso_utc(end_ns)
        f.create_dataset("config", data=self._config_text, dtype=h5py.string_dtype("utf-8"))
        comp: dict[str, Any] = {}
        if self.compression != "none":
            comp = {"compression": self.compression, "shuffle": True}
            if self.compression == "gzip":
                comp["compression_opts"] = 4
        root = f.create_group("devices")
        out: dict[str, _DeviceSets] = {}
        for d in layouts:
            g = root.create_group(d.name)
            for key, val in d.attrs.items():
                g.attrs[key] = _attr_value(val)
            rows = chunk[d.name]
            k = len(d.channels)
            fixed = {"driver": d.driver, "sample_rate_hz": float(d.sample_rate_hz),
                     "period_ns": d.period_ns, "raw_dtype": d.raw_dtype, "n_raw": d.n_raw,
                     "value_dtype": self.value_dtype.name, "compression": self.compression,
                     "chunk_rows": rows, "columns": list(d.names), "units": list(d.units)}
            for key, val in fixed.items():
                g.attrs[key] = val
            sets = _DeviceSets(
                layout=d,
                time_ns=g.create_dataset("time_ns", shape=(0,), maxshape=(None,), chunks=(rows,),
                                         dtype=np.int64, **comp),
                raw=g.create_dataset("raw", shape=(0, d.n_raw), maxshape=(None, d.n_raw),
                                     chunks=(rows, d.n_raw), dtype=np.dtype(d.raw_dtype), **comp),
                value=g.create_dataset("value", shape=(0, k), maxshape=(None, k),
                                       chunks=(rows, k), dtype=self.value_dtype),
                quality=g.create_dataset("quality", shape=(0, k), maxshape=(None, k),
                                         chunks=(rows, k), dtype=np.uint8, **comp),
                blocks=g.create_dataset("blocks", shape=(0,), maxshape=(None,),
                                        chunks=(_BLOCKS_CHUNK_ROWS,), dtype=BLOCKS_DTYPE),
                row_bytes=8 + d.n_raw * np.dtype(d.raw_dtype).itemsize
                + k * (self.value_dtype.itemsize + 1),
            )
            chans = g.create_group("channels")
            for c in d.channels:
                cg = chans.create_group(c.name)
                for key, val in c.attrs.items():
                    cg.attrs[key] = _attr_value(val)
                cg.attrs["column"] = int(c.column)
                cg.attrs["quantity"] = str(c.quantity)
                cg.attrs["unit"] = str(c.unit)
                cg.attrs["measured"] = bool(c.measured)
            out[d.name] = sets
        return out

    def _close_segment(self) -> None:
        """Flush and close the open segment (a flush error leaves it open for a retry)."""
        seg = self._seg
        assert seg is not None
        try:
            seg.f.flush()
            if self.fsync and seg.lock_fd is not None:
                os.fsync(seg.lock_fd)
        except Exception as exc:
            exc._store_where = "flush before close"  # type: ignore[attr-defined]
            raise
        with self._lock:
            if seg.dirty:
                self._c.flush_count += 1
                self._c.last_flush_wall_ns = self._wall_ns()
            self._c.flushed_rows = {n: d.rows for n, d in seg.devices.items()}
        self._flushed(seg)
        try:
            seg.f.close()
        except Exception as exc:  # noqa: BLE001 - data are flushed; report and go on
            self._unclosable.append(seg)     # never free these objects (see "Write errors")
            self._count_error(exc, "close", report=True)
        finally:
            self._drop_segment()

    def _abandon_segment(self) -> None:
        """Give up a segment that keeps failing: close what can be closed, open anew later."""
        seg = self._seg
        if seg is None:
            return
        log.error("giving up segment %s after repeated write errors", seg.path)
        try:
            seg.f.close()
        except Exception:  # noqa: BLE001
            log.debug("close of abandoned segment failed", exc_info=True)
            self._unclosable.append(seg)     # never free these objects (see "Write errors")
        self._carry_unflushed()
        self._drop_segment()
        self._next_reason = "write_error"

    def _flushed(self, seg: _Segment) -> None:
        """A flush succeeded: what is in the file now is on disk; forget the rows kept."""
        self._flushed_at = {n: (d.rows, d.block_rows) for n, d in seg.devices.items()}
        self._flushed_event_rows = seg.event_rows
        self._since_flush = {}
        self._events_since_flush = []
        self._rewind_needed = False

    def _rewind(self) -> None:
        """Cut the datasets back to the last successful flush and queue the rows written since
        for writing again (in front of what is pending), so no lost chunk leaves a hole."""
        seg = self._seg
        assert seg is not None
        for name, ds in seg.devices.items():
            rows0, blocks0 = self._flushed_at.get(name, (0, 0))
            for dset in (ds.raw, ds.value, ds.quality, ds.time_ns):
                _set_rows(dset, rows0)
            _set_rows(ds.blocks, blocks0)
        _set_rows(seg.events, self._flushed_event_rows)
        # the file is consistent again: move the kept rows back to the pending appends
        for name, ds in seg.devices.items():
            ds.rows, ds.block_rows = self._flushed_at.get(name, (0, 0))
            kept = self._since_flush.pop(name, [])
            if kept:
                self._pending[name] = kept + self._pending.get(name, [])
            with self._lock:
                self._c.rows[name] = ds.rows
        seg.event_rows = self._flushed_event_rows
        self._pending_events = self._events_since_flush + self._pending_events
        self._rewind_needed = False
        log.info("rewriting the rows since the last flush of %s", seg.path.name)

    def _carry_unflushed(self) -> None:
        """The segment is given up: its unflushed rows go to the next segment."""
        for name, kept in self._since_flush.items():
            self._pending[name] = kept + self._pending.get(name, [])
        self._pending_events = self._events_since_flush + self._pending_events
        self._since_flush = {}
        self._events_since_flush = []
        self._flushed_at = {}
        self._flushed_event_rows = 0
        self._rewind_needed = False

    def _drop_segment(self) -> None:
        seg = self._seg
        if seg is None:
            return
        if seg.lock_fd is not None:
            os.close(seg.lock_fd)
        self._seg = None
        self._since_flush = {}
        self._events_since_flush = []
        self._flushed_at = {}
        self._flushed_event_rows = 0
        self._rewind_needed = False
        with self._lock:
            self._c.segment = None
            self._c.rows = {}
