"""Disk-backed outbox for the MQTT feed: an append-only segment log with a persisted ack position.

Every QoS 1 message of the feed is appended here first and only forgotten once the broker has
acknowledged it, so broker outages, network loss and restarts of the service (SIGKILL included)
lose nothing that reached the log. Design, chosen for speed:

* Records go to segment files ``<first record number, 16 hex digits>.seg`` in one directory.
  Each record is length-prefixed and CRC-checked (layout below); each append is one writev to
  the OS (no user-space buffer), so a killed process loses nothing that was appended; `sync`
  fsyncs the open segment and the state file on a timer (batched, never per message), which
  bounds what a power loss can take.
* ``state.json`` (written atomically: temp file, fsync, rename) holds the acknowledged position
  and the per-stream sequence counters. On open every segment is scanned: a torn tail (a write
  cut short by a kill) or a corrupted record fails its CRC and is skipped, the rest is kept, and
  the sequence counters are taken past anything found in the log, so sequence numbers never
  repeat across restarts.
* A full or read-only file system makes `append` raise OSError and leaves the log as it was:
  a record written only in part is cut off again (or, if even that fails, marked as a skipped
  range, which the scan at open skips too), no counter moves, and appends work again as soon
  as the disk takes data. A failed state write is logged, kept in `write_error` and retried
  by the next sync; `allocate_seq` goes on handing out numbers meanwhile.
* The log is bounded in bytes: when it grows past ``max_bytes`` the oldest whole segment is
  dropped; the records lost are counted and reported through `take_drops` so the feed can
  announce them.
* Segment files are reused. Once a segment is acknowledged and a written state file covers it
  (so its sequence numbers are on record), it is renamed ``<n>.spare`` instead of being deleted,
  while the spares stay within `spare_bytes` (default an eighth of ``max_bytes``, at least two
  segments), and the next new segment is a spare renamed to its first record and written over
  from byte 0.
  Writing over pages the OS already caches costs a fraction of growing a fresh file (on the
  development VM about 25 against 180-550 us for a 160 kB record), and overwriting blocks
  that are already allocated cannot fail for want of space. A reused file is cut after its
  last record when it is rolled or closed, so only the open segment can end in stale bytes,
  and only after a kill. The scan at open tells them from a record cut short: stale records are
  numbered below the segment's first record (numbers only grow), and stale bytes do not start
  with the header of the record expected there; either ends the segment's data, unreported as
  damage. Spares count towards ``max_bytes`` and are the first thing given up when the bound
  is reached.
* Records are handed out strictly in order (`next_unsent`); acknowledgements may come in any
  order, the ack position advances over the contiguous acknowledged prefix.

Record layout (little-endian), 40-byte header then topic and payload:

    offset size field
    0      4    magic      b"SOBC": the check is CRC-32C (Castagnoli, as in iSCSI);
                           b"SOBX": the check is CRC-32 (zlib's), as written before CRC-32C
                           and still written where google-crc32c has no compiled extension
    4      4    length     u32, whole record including this header
    8      4    crc        of bytes 12 .. length
    12     8    rec        u64, record number (contiguous, monotonic across restarts)
    20     8    seq        u64, sequence number of the record's stream (carried in the payload)
    28     8    time_ns    u64, UTC ns when appended (for the oldest-unsent age)
    36     2    topic_len  u16
    38     1    flags      bit 0 retain, bits 1-2 QoS
    39     1    reserved   0
    40     -    topic (UTF-8, topic_len bytes), then payload (the rest)

The outbox is used from one thread (the feed's); a lock makes the read-only counters safe to
read from others.
"""

from __future__ import annotations

import errno
import json
import logging
import os
import struct
import threading
import time
import zlib
from collections import deque
from dataclasses import dataclass
from typing import Callable

__all__ = ["Outbox", "OutboxRecord", "OutboxDrop", "RECORD_HEADER", "MAGIC", "MAGIC_CRC32",
           "MAGIC_CRC32C", "record_crc"]

import google_crc32c

MAGIC_CRC32C = b"SOBC"
MAGIC_CRC32 = b"SOBX"
#: CRC-32C runs some eight times faster than zlib's CRC-32 with the compiled extension (SSE4.2);
#: its pure-Python fallback would be far slower, so without the extension records keep CRC-32
_FAST_CRC32C = google_crc32c.implementation == "c"
#: the magic of the records written here
MAGIC = MAGIC_CRC32C if _FAST_CRC32C else MAGIC_CRC32
#: magic, length, crc32, rec, seq, time_ns, topic_len, flags, reserved
RECORD_HEADER = struct.Struct("<4sIIQQQHBB")
_HDR = RECORD_HEADER.size  # 40
_MAGICS = (MAGIC_CRC32C, MAGIC_CRC32)
_STATE = "state.json"
_SUFFIX = ".seg"
#: Sequence numbers handed out without a log record (QoS 0 streams) are reserved in blocks of
#: this size in the state file, so they stay monotonic across a kill without a write per message.
SEQ_RESERVE = 10_000
_SPARE_SUFFIX = ".spare"


@dataclass(frozen=True)
class OutboxRecord:
    """One stored message."""

    rec: int
    seq: int
    time_ns: int
    topic: str
    payload: bytes
    qos: int
    retain: bool


@dataclass(frozen=True)
class OutboxDrop:
    """Unacknowledged records discarded because the outbox reached its size bound."""

    count: int
    first_rec: int
    last_rec: int
    bytes: int
    time_ns: int


@dataclass
class _Segment:
    path: str
    first_rec: int      # record number the file name announces
    last_rec: int       # last valid record in it (first_rec - 1 when empty)
    size: int           # bytes written (valid part)
    count: int          # valid records
    skips: dict[int, int]  # corrupt ranges: start offset -> next valid offset (or size)
    first_time_ns: int = 0


def _segment_name(first_rec: int) -> str:
    return f"{first_rec:016x}{_SUFFIX}"


def record_crc(magic: bytes, *parts: bytes) -> int:
    """The check of a record with this magic over `parts` (bytes 12 .. length, in order)."""
    if magic == MAGIC_CRC32C:
        crc = 0
        for part in parts:
            crc = google_crc32c.extend(crc, part)
        return crc
    crc = 0
    for part in parts:
        crc = zlib.crc32(part, crc)
    return crc


def _pack_header(rec: int, seq: int, time_ns: int, topic_b: bytes, payload: bytes, qos: int,
                 retain: bool) -> bytes:
    """Header and topic of a record (the payload follows unchanged)."""
    length = _HDR + len(topic_b) + len(payload)
    flags = (1 if retain else 0) | ((qos & 3) << 1)
    tail = struct.pack("<QQQHBB", rec, seq, time_ns, len(topic_b), flags, 0)
    crc = record_crc(MAGIC, tail, topic_b, payload)
    return b"".join((struct.pack("<4sII", MAGIC, length, crc), tail, topic_b))


def _parse_at(buf: bytes | memoryview, pos: int) -> tuple[int, int, int, int, int, int, int] | None:
    """Validate the record at `pos`: (length, rec, seq, time_ns, topic_len, flags, 0) or None."""
    if pos + _HDR > len(buf):
        return None
    magic, length, crc, rec, seq, time_ns, topic_len, flags, _ = RECORD_HEADER.unpack_from(buf, pos)
    if magic not in _MAGICS or length < _HDR + topic_len or pos + length > len(buf):
        return None
    if record_crc(magic, bytes(buf[pos + 12:pos + length])) != crc:
        return None
    return length, rec, seq, time_ns, topic_len, flags, 0


def _torn_header(buf: bytes | memoryview, pos: int, rec: int) -> bool:
    """Does a record header numbered `rec` start at `pos` (its body failing the CRC)?"""
    if pos + _HDR > len(buf):
        return False
    magic, _, _, found, *_ = RECORD_HEADER.unpack_from(buf, pos)
    return magic in _MAGICS and found == rec


class Outbox:
    """Bounded, ordered, crash-safe store of messages waiting for a broker acknowledgement.

    path:            directory (created, mode 0700).
    max_bytes:       bound on the segment files together; past it the oldest segment is dropped.
    segment_bytes:   size at which a new segment file is started (default max_bytes / 16,
                     between 64 KiB and 16 MiB) - also the granularity of dropping and of
                     reuse (a smaller segment is emptied, and reused, sooner).
    sync_interval_s: how often `maybe_sync` fsyncs (seconds).
    cache_bytes:     recent appends kept in memory for sending (0: always read back).
    spare_bytes:     emptied segment files kept for reuse, in bytes (default max_bytes / 8, at
                     least two segments; 0: delete them).
    """

    def __init__(self, path: str, max_bytes: int = 256 << 20, segment_bytes: int | None = None,
                 sync_interval_s: float = 0.5, log: logging.Logger | None = None,
                 cache_bytes: int = 32 << 20, spare_bytes: int | None = None):
        self.path = str(path)
        self.max_bytes = int(max_bytes)
        if segment_bytes is None:
            segment_bytes = min(max(self.max_bytes // 16, 64 << 10), 16 << 20)
        self.segment_bytes = int(segment_bytes)
        self.sync_interval_s = float(sync_interval_s)
        if spare_bytes is None:
            spare_bytes = max(self.max_bytes // 8, 2 * self.segment_bytes)
        self.spare_bytes_max = int(spare_bytes)
        #: recent appends kept in memory so that sending them needs no read back from disk
        self.cache_bytes = int(cache_bytes)
        self._cache: dict[tuple[str, int], tuple[OutboxRecord, int]] = {}
        self._cache_bytes = 0
        self._doomed: list[str] = []          # segment files to delete on the sync thread
        self._spares: list[tuple[str, int]] = []     # (path, file bytes) ready for reuse
        self._spare_serial = 0
        self._spare_bytes = 0
        self.segments_reused = 0              # new segments that were a spare (this process)
        self.log = log or logging.getLogger("straind.outbox")
        self._lock = threading.RLock()
        self._closed = False
        os.makedirs(self.path, mode=0o700, exist_ok=True)

        self._segments: list[_Segment] = []
        self._acked = -1                       # every record <= this is acknowledged
        self._next_rec = 0
        self._seq: dict[str, int] = {}          # stream -> next sequence number
        self._reserved: dict[str, int] = {}     # stream -> reserved (exclusive) for unlogged seqs
        self.dropped = 0                        # unacknowledged records discarded (size bound)
        self.corrupt = 0                        # damaged regions skipped at open
        #: last failed state write ("OSError: ..."), None once a write succeeds
        self.write_error: str | None = None
        self._drops: list[OutboxDrop] = []
        self._unacked = 0
        self._bytes = 0
        self._sent: deque[tuple[int, int]] = deque()   # (rec, time_ns) handed out, not acked
        self._acked_ahead: set[int] = set()
        self._peeked: OutboxRecord | None = None
        self._state_dirty = False
        self._data_dirty = False
        self._last_sync = time.monotonic()
        self._bg: threading.Thread | None = None
        self._unsynced_fds: list[int] = []     # rolled segments not yet fsynced
        self._dir_dirty = False                # a segment was created since the last sync
        self._state_lock = threading.Lock()
        self._state_gen = 0
        self._state_written_gen = 0
        self._durable_acked = -1

        self._open_existing()
        self._durable_acked = self._acked
        # writer on the last segment (created lazily on the first append)
        self._wfile = None
        self._wseg: _Segment | None = None
        # reader cursor: segment index and byte offset of the next record to hand out
        self._rseg_i = 0
        self._roff = 0
        self._rfd: int | None = None
        self._rfd_path = ""
        self._position_reader()

    # ----------------------------------------------------------------------------- open / scan
    def _open_existing(self) -> None:
        state = {}
        state_path = os.path.join(self.path, _STATE)
        try:
            with open(state_path, "rb") as fh:
                state = json.loads(fh.read().decode("utf-8"))
        except FileNotFoundError:
            pass
        except (OSError, ValueError) as exc:
            self.log.warning("outbox state %s unreadable (%s): replaying everything in the log",
                             state_path, exc)
        self._acked = int(state.get("acked", -1))
        self._next_rec = int(state.get("next_rec", 0))
        self._seq = {str(k): int(v) for k, v in state.get("seq", {}).items()}
        self._reserved = {str(k): int(v) for k, v in state.get("reserved", {}).items()}
        self.dropped = int(state.get("dropped", 0))
        self.corrupt = int(state.get("corrupt", 0))
        self._known_damage = set(map(str, state.get("damaged", [])))
        # unlogged streams restart at their reservation, never below a number already used
        for stream, upto in self._reserved.items():
            self._seq[stream] = max(self._seq.get(stream, 0), upto)

        listing = os.listdir(self.path)
        for name in sorted(n for n in listing if n.endswith(_SPARE_SUFFIX)):
            path = os.path.join(self.path, name)
            try:
                serial = int(name[:-len(_SPARE_SUFFIX)], 16)
                size = os.stat(path).st_size
            except (ValueError, OSError):
                continue
            self._spare_serial = max(self._spare_serial, serial + 1)
            if self._spare_bytes + size <= self.spare_bytes_max:
                self._spares.append((path, size))
                self._spare_bytes += size
            else:
                self._remove_file(path)
        names = sorted(n for n in listing if n.endswith(_SUFFIX))
        last_rec = self._next_rec - 1
        for i, name in enumerate(names):
            try:
                first = int(name[:-len(_SUFFIX)], 16)
            except ValueError:
                continue
            seg = self._scan(os.path.join(self.path, name), first, is_last=(i == len(names) - 1))
            if seg.count == 0 and seg.last_rec <= self._acked:
                # an empty segment left behind (e.g. killed right after rolling)
                if i == len(names) - 1 and seg.size == 0:
                    self._segments.append(seg)
                else:
                    self._remove_file(seg.path)
                continue
            self._segments.append(seg)
            last_rec = max(last_rec, seg.last_rec)
        self._next_rec = max(self._next_rec, last_rec + 1)
        self._bytes = sum(s.size for s in self._segments)
        if self._segments:
            self._acked = max(self._acked, self._segments[0].first_rec - 1)

    def _scan(self, path: str, first_rec: int, is_last: bool) -> _Segment:
        with open(path, "rb") as fh:
            buf = fh.read()
        seg = _Segment(path, first_rec, first_rec - 1, 0, 0, {})
        pos = 0
        n = len(buf)
        expect = first_rec
        unacked = 0
        while pos < n:
            hit = _parse_at(buf, pos)
            if hit is None:
                nxt = self._resync(buf, pos + 1)
                if nxt is not None and _parse_at(buf, nxt)[1] >= expect:
                    # damage with records of this segment after it: skip the bytes between
                    self._damage(path, pos, f"damaged record at byte {pos}, {nxt - pos} bytes "
                                            f"skipped")
                    seg.skips[pos] = nxt
                    pos = nxt
                    continue
                # nothing of this segment follows: its data end here
                torn = _torn_header(buf, pos, expect)
                if not is_last and not torn and nxt is None:
                    # an earlier segment ends at its last record (a reused one is cut at the
                    # roll), so bytes after it that are not stale records are damage
                    self._damage(path, pos, f"damaged record at byte {pos}, {n - pos} bytes "
                                            f"skipped")
                    seg.skips[pos] = n
                    break
                if torn:
                    # the record expected here, cut short by a kill or a power loss
                    self._damage(path, pos, f"incomplete record at byte {pos} ({n - pos} bytes "
                                            f"to the end of the file) discarded")
                else:
                    # the rest of a reused file (a kill came before it was cut)
                    self.log.info("outbox %s: %d bytes after the last record (byte %d) are "
                                  "not records of this segment; cut off", path, n - pos, pos)
                self._cut_file(path, pos)
                n = pos
                break
            length, rec, seq, time_ns, topic_len, flags, _ = hit
            if rec < expect:
                # numbered below what this segment holds: a reused file's stale older records
                # (never data of this segment, since record numbers only grow); the data end
                n = pos
                break
            if seg.count == 0:
                seg.first_time_ns = time_ns
            expect = rec + 1
            seg.last_rec = rec
            seg.count += 1
            if rec > self._acked:
                unacked += 1
            stream = bytes(buf[pos + _HDR:pos + _HDR + topic_len]).decode("utf-8", "replace")
            if seq + 1 > self._seq.get(stream, 0):
                self._seq[stream] = seq + 1
            pos += length
        seg.size = n
        self._unacked += unacked
        return seg

    def _damage(self, path: str, pos: int, what: str) -> None:
        """Count and report a damaged region found by the scan, once: a region that stays in
        the file (skipped, or left when a cut fails) is remembered in the state file."""
        key = f"{os.path.basename(path)}:{pos}"
        if key in self._known_damage:
            self.log.debug("outbox %s: %s (known)", path, what)
            return
        self._known_damage.add(key)
        self.log.warning("outbox %s: %s", path, what)
        self.corrupt += 1
        self._state_dirty = True

    def _cut_file(self, path: str, size: int) -> None:
        try:
            with open(path, "r+b") as fh:
                fh.truncate(size)
        except OSError as exc:      # read-only: the scan at the next open finds it again
            self.log.warning("outbox %s: not cut at byte %d (%s)", path, size, exc)

    @staticmethod
    def _resync(buf: bytes, start: int) -> int | None:
        """Offset of the next valid record at or after `start`, or None."""
        pos = start
        while True:
            hits = [h for h in (buf.find(m, pos) for m in _MAGICS) if h >= 0]
            if not hits:
                return None
            pos = min(hits)
            if _parse_at(buf, pos) is not None:
                return pos
            pos += 1

    def _position_reader(self) -> None:
        """Put the read cursor on the first record after the ack position."""
        self._close_reader()
        self._rseg_i = 0
        self._roff = 0
        self._peeked = None
        while self._rseg_i < len(self._segments):
            seg = self._segments[self._rseg_i]
            if seg.last_rec <= self._acked and self._rseg_i < len(self._segments) - 1:
                self._rseg_i += 1
                continue
            # the last segment stays the reader's even when fully acknowledged: appends may
            # continue it
            if seg.first_rec > self._acked:
                return
            # skip the acknowledged records at the start of this segment
            while True:
                hit = self._read_header(seg, self._roff)
                if hit is None:
                    return
                length, rec = hit[0], hit[1]
                if rec > self._acked:
                    return
                self._roff += length
            return

    # ------------------------------------------------------------------------------- writing
    def append(self, topic: str, payload: bytes | Callable[[int], bytes], qos: int = 1,
               retain: bool = False, stream: str | None = None,
               time_ns: int | None = None, seq: int | None = None) -> tuple[int, int]:
        """Store one message; returns (record number, sequence number of its stream).

        `payload` may be a callable taking the sequence number, so the number can be written
        into the message itself. `stream` names the sequence counter (default: the topic).
        `seq`: a number handed out before (`take_seq`, a message first kept in memory); the
        counter is never moved back. Raises OSError (disk full, read-only) with the log and
        the counters unchanged.
        """
        with self._lock:
            self._check_open()
            stream = topic if stream is None else stream
            if stream != topic:
                raise ValueError("a logged stream is its topic (the counter is rebuilt from "
                                 "the topics in the log)")
            if seq is None:
                seq = self._seq.get(stream, 0)
            seq = int(seq)
            body = payload(seq) if callable(payload) else payload
            topic_b = topic.encode("utf-8")
            if len(topic_b) > 0xFFFF:
                raise ValueError("topic too long")
            t_ns = time.time_ns() if time_ns is None else int(time_ns)
            rec = self._next_rec
            body = bytes(body)
            head = _pack_header(rec, seq, t_ns, topic_b, body, qos, retain)
            size = len(head) + len(body)
            seg = self._writer(size)
            self._write_record(seg, head, body)
            if self._cache_bytes + size <= self.cache_bytes:
                # kept only while there is room: the oldest cached are the next to be sent,
                # so evicting them for a new record would mean reading every one back
                self._cache[(seg.path, seg.size)] = (
                    OutboxRecord(rec, seq, t_ns, topic, body, qos, bool(retain)), size)
                self._cache_bytes += size
            if seg.count == 0:
                seg.first_time_ns = t_ns
            seg.size += size
            seg.last_rec = rec
            seg.count += 1
            self._bytes += size
            self._next_rec = rec + 1
            self._seq[stream] = max(self._seq.get(stream, 0), seq + 1)
            self._unacked += 1
            self._data_dirty = True
            self._state_dirty = True
            if self._bytes + self._spare_bytes > self.max_bytes:
                try:
                    self._enforce_bound()
                except OSError as exc:   # the record is stored; the bound is kept next time
                    self.log.warning("outbox %s: size bound not enforced (%s)", self.path, exc)
            return rec, seq

    def _write_record(self, seg: _Segment, head: bytes, body: bytes) -> None:
        """Write one whole record (header, then payload) at the end of the open segment, or
        raise OSError with the file as it was (a part written before the error is cut off
        again). One writev of both parts: no joined copy of a payload of a few hundred kB, and
        one system call (each is a release and a re-take of the GIL, which costs the most
        when other threads compute)."""
        fd = self._wfile.fileno()
        parts = [memoryview(head), memoryview(body)]
        total = len(head) + len(body)
        written = 0
        try:
            while written < total:
                n = os.writev(fd, parts)
                if not n:
                    raise OSError(errno.EIO, "short write to the outbox")
                written += n
                while parts and n >= len(parts[0]):      # drop what went out
                    n -= len(parts[0])
                    parts.pop(0)
                if parts and n:
                    parts[0] = parts[0][n:]
        except OSError:
            if written:
                self._cut_partial(seg, written)
            raise

    def _cut_partial(self, seg: _Segment, written: int) -> None:
        """Remove a record written in part (`written` bytes after `seg.size`); if the file
        cannot be cut, mark the bytes as a skipped range so the reader (and the scan at the
        next open) steps over."""
        fd = self._wfile.fileno()
        try:
            os.ftruncate(fd, seg.size)
            self._wfile.seek(seg.size)
            return
        except OSError as exc:
            self.log.warning("outbox %s: cannot cut a partly written record (%s); it is "
                             "skipped", seg.path, exc)
        end = seg.size + written
        seg.skips[seg.size] = end
        self._bytes += written
        seg.size = end

    def take_seq(self, stream: str) -> int:
        """Next sequence number of a logged stream for a message not (yet) stored here, e.g.
        kept in memory while the disk is full; persisted with the next state write."""
        with self._lock:
            seq = self._seq.get(stream, 0)
            self._seq[stream] = seq + 1
            self._state_dirty = True
            return seq

    def check_writable(self) -> None:
        """Write the state file now; raises OSError when the disk does not take it."""
        with self._lock:
            self._check_open()
            self._write_state_doc(self._state_doc(), raise_errors=True)

    def allocate_seq(self, stream: str) -> int:
        """Next sequence number of a stream that is published without the log (QoS 0, status).

        Monotonic across restarts: numbers are reserved in blocks in the state file (a kill
        may skip numbers, never repeat one).
        """
        with self._lock:
            self._check_open()
            seq = self._seq.get(stream, 0)
            if seq + 1 > self._reserved.get(stream, 0):
                self._reserved[stream] = seq + SEQ_RESERVE
                try:
                    self._write_state()
                except OSError:
                    # disk full or read-only: go on (logged once in _write_state_doc); the
                    # reservation is written by the next sync that succeeds
                    self._state_dirty = True
            self._seq[stream] = seq + 1
            return seq

    def _writer(self, need: int) -> _Segment:
        seg = self._wseg
        if seg is not None and seg.size > 0 and seg.size + need > self.segment_bytes:
            self._roll()
            seg = None
        if seg is None:
            if self._segments and self._segments[-1].size == 0 and not self._segments[-1].skips:
                seg = self._segments[-1]
                # an empty segment is renamed to the record it will really start with
                if seg.first_rec != self._next_rec:
                    new_path = os.path.join(self.path, _segment_name(self._next_rec))
                    os.replace(seg.path, new_path)
                    seg.path, seg.first_rec, seg.last_rec = new_path, self._next_rec, self._next_rec - 1
            elif self._segments and not self._segments[-1].skips and \
                    self._segments[-1].size + need <= self.segment_bytes and \
                    self._segments[-1].last_rec == self._next_rec - 1:
                seg = self._segments[-1]        # continue the last segment found at open
            else:
                path = os.path.join(self.path, _segment_name(self._next_rec))
                if self._spares:
                    os.replace(self._spares[-1][0], path)   # written over from byte 0
                    self._spare_bytes -= self._spares.pop()[1]
                    self.segments_reused += 1
                seg = _Segment(path, self._next_rec, self._next_rec - 1, 0, 0, {})
                self._segments.append(seg)
            # positioned writes rather than O_APPEND: a reused file's stale tail is overwritten
            self._wfile = open(os.open(seg.path, os.O_WRONLY | os.O_CREAT, 0o600), "wb",
                               buffering=0)
            self._wfile.seek(seg.size)
            self._wseg = seg
            self._dir_dirty = True        # the new name is made durable by the next sync
        return seg

    def _roll(self) -> None:
        if self._wfile is not None:
            self._cut_stale_tail()
            self._unsynced_fds.append(os.dup(self._wfile.fileno()))   # fsynced by the next sync
            self._wfile.close()
        self._wfile = None
        self._wseg = None

    def _cut_stale_tail(self) -> None:
        """Cut a reused file after its last record when it is finished with (rolled, closed),
        so that only the open segment can ever end in stale bytes (the scan at open treats
        anything after the records of an earlier segment as damage)."""
        fd = self._wfile.fileno()
        try:
            if os.fstat(fd).st_size > self._wseg.size:
                os.ftruncate(fd, self._wseg.size)
        except OSError as exc:
            self.log.warning("outbox %s: stale bytes after the last record not cut (%s)",
                             self._wseg.path, exc)

    def flush(self) -> None:
        """Kept for callers: appends reach the OS at once (a kill loses nothing appended)."""

    def _enforce_bound(self) -> None:
        while self._spares and self._bytes + self._spare_bytes > self.max_bytes:
            path, spare_bytes = self._spares.pop(0)     # spares go first
            self._spare_bytes -= spare_bytes
            self._doomed.append(path)
        while self._bytes > self.max_bytes and self._segments:
            seg = self._segments[0]
            if seg is self._wseg:
                if len(self._segments) == 1 and seg.count <= 1:
                    # a single record larger than the bound: keep it rather than lose the newest
                    return
                self._roll()
                if len(self._segments) == 1:
                    # start a fresh segment so the full one can go
                    path = os.path.join(self.path, _segment_name(self._next_rec))
                    self._segments.append(_Segment(path, self._next_rec, self._next_rec - 1, 0, 0, {}))
                    open(path, "ab").close()
            self._drop_segment()

    def _drop_segment(self) -> None:
        seg = self._segments.pop(0)
        lost_first = max(seg.first_rec, self._acked + 1)
        lost = max(0, seg.last_rec - self._acked) if seg.last_rec > self._acked else 0
        lost = min(lost, seg.count)
        if lost:
            self.dropped += lost
            self._unacked -= lost
            self._drops.append(OutboxDrop(lost, lost_first, seg.last_rec, seg.size, time.time_ns()))
            self.log.debug("outbox full (%d bytes > %d): dropped %d unsent message(s), "
                             "records %d..%d", self._bytes, self.max_bytes, lost, lost_first,
                             seg.last_rec)
        self._acked = max(self._acked, seg.last_rec)
        while self._sent and self._sent[0][0] <= self._acked:
            self._sent.popleft()
        self._acked_ahead = {r for r in self._acked_ahead if r > self._acked}
        self._bytes -= seg.size
        # the reader moves on if it was inside the dropped segment
        if self._rseg_i == 0:
            self._close_reader()
            self._roff = 0
            self._peeked = None
        else:
            self._rseg_i -= 1
        if self._peeked is not None and self._peeked.rec <= self._acked:
            self._peeked = None
        self._forget_segment(seg)
        self._state_dirty = True

    def _forget_segment(self, seg: _Segment, reuse: bool = False) -> None:
        """A segment leaves the log: the next sync (off this thread) deletes its file, or with
        `reuse`, while spares are wanted, renames it a spare."""
        if self._rfd_path == seg.path:
            self._close_reader()
        if self._cache:
            for key in [k for k in self._cache if k[0] == seg.path]:
                self._cache_bytes -= self._cache.pop(key)[1]
        if (reuse and not seg.skips and self._spare_bytes + seg.size <= self.spare_bytes_max
                and self._bytes + self._spare_bytes + seg.size <= self.max_bytes):
            # a rename is cheap enough for this thread (a delete frees blocks: the sync does it)
            spare = os.path.join(self.path, f"{self._spare_serial:016x}{_SPARE_SUFFIX}")
            try:
                os.replace(seg.path, spare)
            except OSError as exc:
                self.log.warning("outbox %s: not kept for reuse (%s)", seg.path, exc)
            else:
                self._spare_serial += 1
                self._spares.append((spare, seg.size))
                self._spare_bytes += seg.size
                self._dir_dirty = True
                return
        self._doomed.append(seg.path)

    def take_drops(self) -> list[OutboxDrop]:
        """Drops since the last call (for announcing them)."""
        with self._lock:
            out, self._drops = self._drops, []
            return out

    # ------------------------------------------------------------------------------- reading
    def _open_reader(self, seg: _Segment) -> int:
        if self._rfd is None or self._rfd_path != seg.path:
            self._close_reader()
            self._rfd = os.open(seg.path, os.O_RDONLY)
            self._rfd_path = seg.path
        return self._rfd

    def _close_reader(self) -> None:
        if self._rfd is not None:
            os.close(self._rfd)
        self._rfd = None
        self._rfd_path = ""

    def _read_header(self, seg: _Segment, off: int):
        while off in seg.skips:
            off = seg.skips[off]
            self._roff = off
        if off + _HDR > seg.size:
            return None
        fd = self._open_reader(seg)
        hdr = os.pread(fd, _HDR, off)
        if len(hdr) < _HDR:
            return None
        magic, length, crc, rec, seq, time_ns, topic_len, flags, _ = RECORD_HEADER.unpack(hdr)
        return length, rec, seq, time_ns, topic_len, flags, crc

    def _read_record(self) -> OutboxRecord | None:
        while self._rseg_i < len(self._segments):
            seg = self._segments[self._rseg_i]
            while self._roff in seg.skips:
                self._roff = seg.skips[self._roff]
            cached = self._cache.pop((seg.path, self._roff), None)
            if cached is not None:          # appended by this process: no need to read it back
                record, length = cached
                self._cache_bytes -= length
                self._roff += length
                if record.rec <= self._acked:
                    continue
                return record
            hit = self._read_header(seg, self._roff)
            if hit is None:
                if seg is self._wseg or self._rseg_i == len(self._segments) - 1:
                    return None
                self._rseg_i += 1
                self._roff = 0
                continue
            length, rec, seq, time_ns, topic_len, flags, crc = hit
            body = os.pread(self._rfd, length - _HDR, self._roff + _HDR)
            self._roff += length
            if rec <= self._acked:
                continue
            topic = body[:topic_len].decode("utf-8")
            return OutboxRecord(rec, seq, time_ns, topic, body[topic_len:], (flags >> 1) & 3,
                                bool(flags & 1))
        return None

    def peek(self) -> OutboxRecord | None:
        """The next record `next_unsent` would return, without handing it out."""
        with self._lock:
            self._check_open()
            if self._peeked is None:
                self._peeked = self._read_record()
            return self._peeked

    def next_unsent(self) -> OutboxRecord | None:
        """Hand out the next record in order (it stays stored until `ack`)."""
        with self._lock:
            rec = self.peek()
            self._peeked = None
            if rec is not None:
                self._sent.append((rec.rec, rec.time_ns))
            return rec

    def ack(self, rec: int) -> None:
        """The broker acknowledged record `rec`; advance over the acknowledged prefix."""
        with self._lock:
            if rec <= self._acked or not self._sent:
                return
            if rec == self._sent[0][0] and not self._acked_ahead:
                self._sent.popleft()            # the usual case: acknowledgements in order
                self._acked = rec
                self._unacked -= 1
                self._state_dirty = True
                return
            if not (self._sent[0][0] <= rec <= self._sent[-1][0]):
                return                          # not handed out (or already forgotten)
            self._acked_ahead.add(rec)
            while self._sent and self._sent[0][0] in self._acked_ahead:
                r, _ = self._sent.popleft()
                self._acked_ahead.discard(r)
                self._acked = r
                self._unacked -= 1
                self._state_dirty = True

    def rewind(self) -> None:
        """Forget what was handed out and not acknowledged: it will be handed out again."""
        with self._lock:
            self._sent.clear()
            self._acked_ahead.clear()
            self._position_reader()

    # ------------------------------------------------------------------------------- syncing
    def maybe_sync(self) -> bool:
        """Start a background sync if the sync interval has passed; True if it did.

        The fsyncs run on a short-lived helper thread so the feed thread never waits for the
        disk; segments are removed only once a written state file covers their records.
        """
        with self._lock:
            if self._closed:
                return False
            self._remove_acked_segments(self._durable_acked)
            if self._bg is not None and self._bg.is_alive():
                return False
            if time.monotonic() - self._last_sync < self.sync_interval_s:
                return False
            work = self._prepare_sync()
            if not work[0] and work[1] is None and not work[2]:
                return False
            self._bg = threading.Thread(target=self._finish_sync, args=work,
                                        name="straind-outbox-sync", daemon=True)
            self._bg.start()
            return True

    def sync(self) -> None:
        """fsync the open segment, persist the ack position and remove acknowledged segments
        (blocking)."""
        bg = self._bg
        if bg is not None:
            bg.join()
        with self._lock:
            if self._closed:
                return
            self._finish_sync(*self._prepare_sync())
            if self._remove_acked_segments(self._durable_acked):
                self._finish_sync(*self._prepare_sync())

    def _prepare_sync(self) -> tuple[list[int], dict | None, list[str]]:
        """Hand data to the OS and collect what the sync must make durable (under the lock)."""
        self._last_sync = time.monotonic()
        doomed, self._doomed = self._doomed, []
        fds, self._unsynced_fds = self._unsynced_fds, []
        if self._dir_dirty:
            try:
                fds.append(os.open(self.path, os.O_RDONLY))   # the directory: new names
                self._dir_dirty = False
            except OSError:
                pass                                           # tried again at the next sync
        if self._wfile is not None and self._data_dirty:
            fds.append(os.dup(self._wfile.fileno()))
        self._data_dirty = False
        state = None
        if self._state_dirty:
            state = self._state_doc()
            self._state_dirty = False
        return fds, state, doomed

    def _finish_sync(self, fds: list[int], state: dict | None, doomed: list[str]) -> None:
        for path in doomed:
            self._remove_file(path)
        if doomed:
            self._fsync_dir()
        for fd in fds:
            try:
                os.fsync(fd)
            except OSError as exc:  # pragma: no cover - disk trouble
                self.log.error("outbox fsync failed: %s", exc)
            finally:
                os.close(fd)
        if state is not None:
            self._write_state_doc(state, raise_errors=False)
            if self._state_written_gen < state["gen"]:
                return                    # not written: segments stay until it is
            self._durable_acked = max(self._durable_acked, state["acked"])

    def _remove_acked_segments(self, acked: int) -> bool:
        removed = False
        while len(self._segments) > 1 and self._segments[0].last_rec <= acked \
                and self._segments[0] is not self._wseg:
            seg = self._segments.pop(0)
            self._bytes -= seg.size
            if self._rseg_i > 0:
                self._rseg_i -= 1
            else:
                self._close_reader()
                self._roff = 0
            self._forget_segment(seg, reuse=True)
            removed = True
        return removed

    def _state_doc(self) -> dict:
        self._state_gen += 1
        return {"version": 1, "gen": self._state_gen, "acked": self._acked,
                "next_rec": self._next_rec, "seq": dict(self._seq),
                "reserved": dict(self._reserved), "dropped": self.dropped,
                "corrupt": self.corrupt, "damaged": self._damaged_now()}

    def _damaged_now(self) -> list[str]:
        """The known damaged regions that are still in a segment file."""
        names = {os.path.basename(seg.path) for seg in self._segments}
        return sorted(k for k in self._known_damage if k.split(":")[0] in names)

    def _write_state(self) -> None:
        """Write the current state now (blocking)."""
        self._write_state_doc(self._state_doc())

    def _write_state_doc(self, state: dict, raise_errors: bool = True) -> None:
        with self._state_lock:
            if state["gen"] <= self._state_written_gen:
                return                    # a newer state is already on disk
            path = os.path.join(self.path, _STATE)
            tmp = path + ".tmp"
            try:
                with open(tmp, "wb") as fh:
                    fh.write(json.dumps(state, sort_keys=True).encode("utf-8"))
                    fh.flush()
                    os.fsync(fh.fileno())
                os.replace(tmp, path)
            except OSError as exc:
                # disk full / read-only: the old state file stays whole; write again later
                self._state_dirty = True
                key = f"{type(exc).__name__}: {exc}"
                if key != self.write_error:
                    self.log.error("outbox state %s not written (%s); retried at the next "
                                   "sync", path, exc)
                self.write_error = key
                try:
                    os.remove(tmp)
                except OSError:
                    pass
                if raise_errors:
                    raise
                return
            self.write_error = None
            self._state_written_gen = state["gen"]

    def _fsync_dir(self) -> None:
        try:
            fd = os.open(self.path, os.O_RDONLY)
        except OSError:
            return
        try:
            os.fsync(fd)
        except OSError:
            pass
        finally:
            os.close(fd)

    def _remove_file(self, path: str) -> None:
        try:
            os.remove(path)
        except FileNotFoundError:
            pass

    def close(self) -> None:
        """sync and release the files; idempotent."""
        with self._lock:
            if self._closed:
                return
            self.sync()
            if self._wfile is not None:
                self._cut_stale_tail()
                self._wfile.close()
                self._wfile = None
            self._close_reader()
            self._closed = True

    def _check_open(self) -> None:
        if self._closed:
            raise ValueError("outbox is closed")

    # ---------------------------------------------------------------------------- inspection
    @property
    def depth(self) -> int:
        """Messages stored and not yet acknowledged (sent or not)."""
        return self._unacked

    @property
    def in_flight(self) -> int:
        """Messages handed out and waiting for their acknowledgement."""
        return len(self._sent)

    @property
    def bytes(self) -> int:
        """Bytes of the records in the segment files (spares and stale tails not counted)."""
        return self._bytes

    @property
    def acked_position(self) -> int:
        return self._acked

    @property
    def next_record(self) -> int:
        return self._next_rec

    def next_seq(self, stream: str) -> int:
        """The sequence number the next message of `stream` will get."""
        return self._seq.get(stream, 0)

    def oldest_unacked_time_ns(self) -> int | None:
        """Append time of the oldest message not yet acknowledged, or None when empty."""
        with self._lock:
            if self._sent:
                return self._sent[0][1]
            if self._unacked <= 0 or self._closed:
                return None
            rec = self.peek()
            return None if rec is None else rec.time_ns

    def stats(self) -> dict:
        """Counters for status reports."""
        oldest = self.oldest_unacked_time_ns()
        return {"path": self.path, "depth": self.depth, "in_flight": self.in_flight,
                "bytes": self.bytes, "spare_bytes": self._spare_bytes,
                "segments_reused": self.segments_reused,
                "max_bytes": self.max_bytes, "dropped": self.dropped,
                "corrupt_skipped": self.corrupt, "state_write_error": self.write_error,
                "oldest_unsent_age_s": None if oldest is None
                else max(0.0, (time.time_ns() - oldest) / 1e9)}
