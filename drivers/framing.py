"""The framed binary serial protocol of straind's bridge front-ends: CRC, encoding and parsing.

Every frame, in both directions, has the same envelope (all multi-byte fields big-endian):

    offset  size  field
    0       2     SYNC   0xA5 0x5A
    2       1     TYPE   frame type (see `FrameType`)
    3       2     LEN    length of the whole frame in bytes, SYNC and CRC included (uint16)
    5       4     SEQ    DATA: frame counter (uint32, wraps to 0 after 0xFFFFFFFF);
                         command: command id chosen by the host; ACK/NAK: the id being answered
    9       L-11  PAYLOAD
    L-2     2     CRC    CRC-16/CCITT-FALSE (poly 0x1021, init 0xFFFF, no reflection, xorout 0)
                         over bytes 2 .. L-3 (TYPE up to the last payload byte), big-endian

A DATA frame (front-end to host) carries `s` samples of all `m` channels:

    9       1     NCH    channel count m (1..255)
    10      1     NS     samples per frame s (1..255)
    11      m     STATUS one byte per channel, valid for every sample of the frame:
                         bit 0 (0x01) input over range (saturated), bit 1 (0x02) open bridge,
                         bit 2 (0x04) excitation fault, bit 6 (0x40) shunt resistor switched in;
                         other bits reserved (sent as 0, ignored by the host)
    11+m    3*m*s SAMPLES sample-major (sample 0: channel 0 .. m-1, then sample 1 ...), each a
                         signed 24-bit two's complement code, big-endian
    L = 13 + m + 3*m*s

The status bits are the values of the matching `Quality` flags, so the host copies them over.
The frame counter counts frames the converter produced, sent or not, so a gap in it is a loss;
the first sample of frame `seq` is sample number seq * s of the converter's sample clock.

Commands (host to front-end) and their answers (front-end to host):

    type  name       payload                         LEN
    0x10  START      -                               11
    0x11  STOP       -                               11
    0x12  SET_RATE   rate in mHz, uint32             15
    0x13  SET_GAIN   channel (0xFF = all), gain      13
    0x14  SHUNT      channel (0xFF = all), 0 off/1 on 13
    0x81  ACK        command type, 0                 13
    0x82  NAK        command type, reason            13   (see `NakReason`)

The parser here is vectorised over whole read buffers: sync candidates are found with one numpy
pass, headers of all candidates are checked at once, the CRCs of all candidate frames of one
length are computed together (one numpy operation per 16-bit column, `crc16_rows`), and the
24-bit samples of all good frames are decoded in one go.
"""

from __future__ import annotations

import enum
import functools
from dataclasses import dataclass

import numpy as np

__all__ = [
    "SYNC",
    "SYNC0",
    "SYNC1",
    "FrameType",
    "NakReason",
    "STATUS_MASK",
    "MIN_FRAME_BYTES",
    "DATA_HEADER_BYTES",
    "SEQ_MODULO",
    "CONTROL_LENGTHS",
    "crc16_ccitt_false",
    "crc16_rows",
    "crc16_columns",
    "data_frame_bytes",
    "encode_frame",
    "encode_data_frames",
    "encode_command",
    "ControlFrame",
    "Parsed",
    "FrameParser",
    "decode_codes24",
    "sniff_data_format",
]

SYNC0, SYNC1 = 0xA5, 0x5A
SYNC = bytes((SYNC0, SYNC1))
#: SYNC, TYPE, LEN, SEQ
ENVELOPE_BYTES = 9
#: ENVELOPE + NCH + NS
DATA_HEADER_BYTES = 11
#: the shortest frame: an envelope without payload plus the CRC
MIN_FRAME_BYTES = ENVELOPE_BYTES + 2
MAX_FRAME_BYTES = 0xFFFF
#: the frame counter is 32 bits wide
SEQ_MODULO = 1 << 32
#: status bits the host honours: saturated, open bridge, excitation fault, shunt on
STATUS_MASK = 0x47


class FrameType(enum.IntEnum):
    """Values of the TYPE byte."""

    DATA = 0x01
    START = 0x10
    STOP = 0x11
    SET_RATE = 0x12
    SET_GAIN = 0x13
    SHUNT = 0x14
    ACK = 0x81
    NAK = 0x82


class NakReason(enum.IntEnum):
    """Second payload byte of a NAK."""

    UNKNOWN_COMMAND = 1
    BAD_ARGUMENT = 2      #: channel out of range, unsupported rate or gain
    NOT_NOW = 3           #: not possible in the current state
    MALFORMED = 4         #: payload length wrong for the command


#: Fixed frame length of every non-DATA frame type.
CONTROL_LENGTHS: dict[int, int] = {
    FrameType.START: 11,
    FrameType.STOP: 11,
    FrameType.SET_RATE: 15,
    FrameType.SET_GAIN: 13,
    FrameType.SHUNT: 13,
    FrameType.ACK: 13,
    FrameType.NAK: 13,
}
_CONTROL_LEN_TABLE = np.zeros(256, dtype=np.int64)
for _t, _l in CONTROL_LENGTHS.items():
    _CONTROL_LEN_TABLE[int(_t)] = _l


# ------------------------------------------------------------------------------------------
# CRC-16/CCITT-FALSE
# ------------------------------------------------------------------------------------------

def _make_table8() -> np.ndarray:
    table = np.zeros(256, dtype=np.uint16)
    for byte in range(256):
        crc = byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) if crc & 0x8000 else (crc << 1)
            crc &= 0xFFFF
        table[byte] = crc
    return table


#: CRC of each byte value shifted through the register (the classic 256-entry table).
CRC_TABLE8 = _make_table8()
_TABLE8_LIST = [int(v) for v in CRC_TABLE8]


def _make_table16(t8: np.ndarray) -> np.ndarray:
    # state v fed with two zero bytes; with a 16-bit register, feeding bytes b0, b1 from
    # state s equals feeding two zero bytes from state s ^ (b0 << 8 | b1)
    v = np.arange(65536, dtype=np.uint32)
    for _ in range(2):
        v = ((v << 8) & 0xFFFF) ^ t8[(v >> 8) & 0xFF].astype(np.uint32)
    return v.astype(np.uint16)


#: 65536-entry table: one lookup advances the CRC by a 16-bit word (two bytes).
CRC_TABLE16 = _make_table16(CRC_TABLE8)


def crc16_ccitt_false(data: bytes | bytearray | memoryview, crc: int = 0xFFFF) -> int:
    """CRC-16/CCITT-FALSE of `data` (table-driven, one byte per step); `crc` continues a run."""
    table = _TABLE8_LIST
    for b in bytes(data):
        crc = ((crc << 8) & 0xFFFF) ^ table[(crc >> 8) ^ b]
    return crc


_SHIFT_TABLES: list[np.ndarray] = [CRC_TABLE16]


def _shift_table(level: int) -> np.ndarray:
    """Table of the register after 2**level zero words, for every 16-bit start state."""
    while len(_SHIFT_TABLES) <= level:
        t = _SHIFT_TABLES[-1]
        _SHIFT_TABLES.append(t[t])
    return _SHIFT_TABLES[level]


#: word table followed by 0, 1, 2, 3 zero words
_GROUP_TABLES = [CRC_TABLE16]
for _ in range(3):
    _GROUP_TABLES.append(CRC_TABLE16[_GROUP_TABLES[-1]])


@functools.lru_cache(maxsize=64)
def _init_term(n_bytes: int) -> int:
    """What the initial value 0xFFFF contributes to the register after n_bytes bytes."""
    crc = 0xFFFF
    t16 = CRC_TABLE16
    if n_bytes % 2:
        crc = crc16_ccitt_false(b"\0", crc)
    for _ in range(n_bytes // 2):
        crc = int(t16[crc])
    return crc


def crc16_rows(rows: np.ndarray) -> np.ndarray:
    """CRC-16/CCITT-FALSE of every row of a (k, n) uint8 array at once, as (k,) uint16.

    The CRC is linear: with a zero start, crc(A + B) = shift(crc(A), len(B)) ^ crc(B), and the
    start value 0xFFFF adds a term that depends on the length only. So all groups of four
    16-bit words are reduced at once (four table lookups), then neighbouring pieces are
    combined pairwise (one lookup in a 65536-entry "shift by 2**level words" table per level):
    about log2(n) numpy operations for all k rows together, whatever k is.
    """
    rows = np.asarray(rows, dtype=np.uint8)
    if rows.ndim != 2:
        raise ValueError("rows must be a 2-D uint8 array")
    k, n = rows.shape
    if k == 0 or n == 0:
        return np.full(k, 0xFFFF, dtype=np.uint16)
    # leading zero bytes do not change a zero-start CRC: pad each row at the front to whole
    # groups of four words
    nb = -(-n // 8) * 8
    padded = np.zeros((k, nb), dtype=np.uint8)
    padded[:, nb - n:] = rows
    w = padded.view(">u2").reshape(k, nb // 8, 4)
    # zero-start CRC of each 4-word group: each word's table value shifted past the words
    # that follow it in the group (one lookup per word, in four 65536-entry tables)
    q = _GROUP_TABLES
    c = q[3][w[:, :, 0]]
    c ^= q[2][w[:, :, 1]]
    c ^= q[1][w[:, :, 2]]
    c ^= q[0][w[:, :, 3]]
    level = 2                              # pieces of 2**2 words
    while c.shape[1] > 1:
        if c.shape[1] % 2:                 # a leading zero piece: again no change
            c = np.concatenate((np.zeros((k, 1), dtype=np.uint16), c), axis=1)
        c = _shift_table(level)[c[:, 0::2]] ^ c[:, 1::2]
        level += 1
    return c[:, 0] ^ np.uint16(_init_term(n))


def crc16_columns(rows: np.ndarray) -> np.ndarray:
    """Reference vectorised CRC: the 256-entry table applied byte column by byte column.

    One numpy step per byte position for all rows; simpler than `crc16_rows`, slower for
    long frames. Kept as a second, independent vectorised implementation for the tests and
    the benchmark.
    """
    rows = np.asarray(rows, dtype=np.uint8)
    k, n = rows.shape
    crc = np.full(k, 0xFFFF, dtype=np.uint16)
    for j in range(n):
        crc = (crc << 8) ^ CRC_TABLE8[(crc >> 8) ^ rows[:, j]]
    return crc


# ------------------------------------------------------------------------------------------
# encoding
# ------------------------------------------------------------------------------------------

def data_frame_bytes(n_channels: int, samples_per_frame: int) -> int:
    """Length of a DATA frame in bytes: 13 + m + 3 m s."""
    return 13 + n_channels + 3 * n_channels * samples_per_frame


def encode_frame(frame_type: int, seq: int, payload: bytes = b"") -> bytes:
    """One frame of any type (table-driven CRC); used for commands and answers."""
    length = MIN_FRAME_BYTES + len(payload)
    if length > MAX_FRAME_BYTES:
        raise ValueError(f"frame of {length} bytes is longer than {MAX_FRAME_BYTES}")
    body = (bytes((int(frame_type),)) + length.to_bytes(2, "big")
            + (int(seq) % SEQ_MODULO).to_bytes(4, "big") + payload)
    return SYNC + body + crc16_ccitt_false(body).to_bytes(2, "big")


def encode_command(frame_type: FrameType, command_id: int, *, channel: int | None = None,
                   value: int | None = None, rate_hz: float | None = None) -> bytes:
    """A host command frame: START/STOP (no arguments), SET_RATE(rate_hz), SET_GAIN(channel,
    value = gain), SHUNT(channel, value = 0/1); channel None means all channels (0xFF)."""
    ft = FrameType(frame_type)
    if ft in (FrameType.START, FrameType.STOP):
        payload = b""
    elif ft is FrameType.SET_RATE:
        if rate_hz is None or not 0 < rate_hz * 1000 < SEQ_MODULO:
            raise ValueError(f"rate out of range: {rate_hz!r}")
        payload = int(round(rate_hz * 1000)).to_bytes(4, "big")
    elif ft in (FrameType.SET_GAIN, FrameType.SHUNT):
        ch = 0xFF if channel is None else int(channel)
        if not 0 <= ch <= 0xFF or value is None or not 0 <= int(value) <= 0xFF:
            raise ValueError(f"bad channel/value for {ft.name}: {channel!r}, {value!r}")
        payload = bytes((ch, int(value)))
    else:
        raise ValueError(f"{ft.name} is not a command")
    return encode_frame(ft, command_id, payload)


def encode_data_frames(first_seq: int | np.ndarray, codes: np.ndarray, status: np.ndarray,
                       samples_per_frame: int) -> bytes:
    """Encode k DATA frames at once.

    first_seq:  sequence number of the first frame (the others follow by one, wrapping at
                2**32) or a (k,) array of sequence numbers.
    codes:      (k * s, m) integer codes in [-2**23, 2**23 - 1].
    status:     (k, m) uint8 status bytes, or (m,) for all frames.
    """
    s = int(samples_per_frame)
    codes = np.asarray(codes)
    if codes.ndim != 2:
        raise ValueError("codes must be (n, m)")
    n, m = codes.shape
    if not 1 <= m <= 255 or not 1 <= s <= 255:
        raise ValueError(f"channels ({m}) and samples per frame ({s}) must be 1..255")
    if n % s:
        raise ValueError(f"{n} samples is not a whole number of {s}-sample frames")
    if np.any(codes < -(1 << 23)) or np.any(codes >= (1 << 23)):
        raise ValueError("codes must fit in signed 24 bits")
    k = n // s
    length = data_frame_bytes(m, s)
    if length > MAX_FRAME_BYTES:
        raise ValueError(f"a frame of {m} channels x {s} samples is {length} bytes, too long")
    if np.ndim(first_seq) == 0:
        seq = (int(first_seq) + np.arange(k, dtype=np.int64)) % SEQ_MODULO
    else:
        seq = np.asarray(first_seq, dtype=np.int64) % SEQ_MODULO
        if seq.shape != (k,):
            raise ValueError("need one sequence number per frame")
    status = np.broadcast_to(np.asarray(status, dtype=np.uint8), (k, m))
    out = np.empty((k, length), dtype=np.uint8)
    out[:, 0] = SYNC0
    out[:, 1] = SYNC1
    out[:, 2] = FrameType.DATA
    out[:, 3] = length >> 8
    out[:, 4] = length & 0xFF
    for i, shift in enumerate((24, 16, 8, 0)):
        out[:, 5 + i] = (seq >> shift) & 0xFF
    out[:, 9] = m
    out[:, 10] = s
    out[:, 11:11 + m] = status
    v = codes.astype(np.int64).reshape(k, s * m) & 0xFFFFFF
    samples = out[:, 11 + m:length - 2].reshape(k, s * m, 3)
    samples[:, :, 0] = v >> 16
    samples[:, :, 1] = (v >> 8) & 0xFF
    samples[:, :, 2] = v & 0xFF
    crc = crc16_rows(out[:, 2:length - 2])
    out[:, length - 2] = crc >> 8
    out[:, length - 1] = crc & 0xFF
    return out.tobytes()


def decode_codes24(triples: np.ndarray) -> np.ndarray:
    """(..., 3) uint8 big-endian signed 24-bit values -> (...) int32 (reference decoder).

    The three bytes are placed in the top of a big-endian 32-bit word and shifted down
    arithmetically, which sign-extends bit 23. The parser uses the same idea without copying.
    """
    triples = np.asarray(triples, dtype=np.uint8)
    word = np.zeros(triples.shape[:-1] + (4,), dtype=np.uint8)
    word[..., :3] = triples
    return (word.view(">i4")[..., 0] >> 8).astype(np.int32)


class _Frames:
    """k frames of one length laid out at a fixed stride in a byte buffer (no copy if possible).

    base/offset: the buffer and the byte offset of the first frame; frame i starts at
    offset + i * length.
    """

    __slots__ = ("pos", "length", "base", "offset")

    def __init__(self, a: np.ndarray, buf: bytes, pos: np.ndarray, length: int):
        self.pos = pos
        self.length = length
        k = pos.size
        if k and int(pos[-1]) - int(pos[0]) == (k - 1) * length and (
                k < 3 or bool(np.all(np.diff(pos) == length))):
            self.base, self.offset = buf, int(pos[0])          # back to back: the usual case
        else:
            self.base, self.offset = a[pos[:, None] + np.arange(length)], 0

    def field(self, start: int, width: int, dtype: str = "u1") -> np.ndarray:
        """(k, width) array of items of `dtype` from byte `start` of every frame, by view."""
        item = np.dtype(dtype).itemsize
        return np.ndarray((self.pos.size, width), dtype=dtype, buffer=self.base,
                          offset=self.offset + start, strides=(self.length, item))

    def codes(self, start: int, n: int) -> np.ndarray:
        """(k, n) int32 from n consecutive signed 24-bit big-endian values at byte `start`.

        Each value is read as the big-endian 32-bit word that begins at its first byte (its
        three bytes and one byte after it, which always exists: the CRC follows the samples)
        and shifted right by 8 arithmetically.
        """
        v = np.ndarray((self.pos.size, n), dtype=">i4", buffer=self.base,
                       offset=self.offset + start, strides=(self.length, 3))
        out = v.astype(np.int32)
        out >>= 8
        return out

    def subset(self, want: np.ndarray) -> "_Frames":
        if want.size == self.pos.size:
            return self
        sel = np.searchsorted(self.pos, want)
        out = object.__new__(_Frames)
        out.pos, out.length = want, self.length
        out.base = np.ascontiguousarray(self.field(0, self.length)[sel])
        out.offset = 0
        return out


def sniff_data_format(data: bytes, max_candidates: int = 64) -> tuple[int, int] | None:
    """(channels, samples per frame) of the first good DATA frame in `data`, whatever its
    channel count; None if there is none. A diagnostic for a wrongly configured device (not
    the hot path: it tries candidates one by one)."""
    i = 0
    for _ in range(max_candidates):
        j = data.find(SYNC, i)
        if j < 0 or j + DATA_HEADER_BYTES > len(data):
            return None
        if data[j + 2] == FrameType.DATA:
            length = int.from_bytes(data[j + 3:j + 5], "big")
            m, s = data[j + 9], data[j + 10]
            if (m and s and length == data_frame_bytes(m, s) and j + length <= len(data)
                    and crc16_ccitt_false(data[j + 2:j + length]) == 0):
                return m, s
        i = j + 1
    return None


# ------------------------------------------------------------------------------------------
# parsing
# ------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class ControlFrame:
    """A good non-DATA frame: a command (front-end side) or an ACK/NAK (host side)."""

    frame_type: int
    seq: int
    payload: bytes

    @property
    def command(self) -> int:
        """For ACK/NAK: the type of the command answered."""
        return self.payload[0] if self.payload else 0

    @property
    def reason(self) -> int:
        """For NAK: the reason code."""
        return self.payload[1] if len(self.payload) > 1 else 0


@dataclass(frozen=True)
class Parsed:
    """What one `FrameParser.feed` call found, in stream order.

    seq:               (k,) uint32 frame counters of the good DATA frames
    samples_per_frame: (k,) int64 samples in each of them
    status:            (k, m) uint8 status bytes (reserved bits cleared)
    codes:             (sum of samples_per_frame, m) int32 codes, frame after frame
    controls:          good non-DATA frames
    crc_errors:        frame headers that looked right but whose CRC failed
    resyncs:           times the parser found a good frame again after skipping bytes
    discarded_bytes:   bytes that belonged to no good frame
    """

    seq: np.ndarray
    samples_per_frame: np.ndarray
    status: np.ndarray
    codes: np.ndarray
    controls: tuple[ControlFrame, ...] = ()
    crc_errors: int = 0
    resyncs: int = 0
    discarded_bytes: int = 0

    @property
    def n_frames(self) -> int:
        return int(self.seq.shape[0])


class FrameParser:
    """Incremental, vectorised parser of a byte stream into frames.

    n_channels:        the channel count DATA frames must carry; None accepts no DATA frames
                       at all (a front-end parsing host commands).
    samples_per_frame: if given, DATA frames with another count are not accepted.

    Bytes may arrive split anywhere; an incomplete frame at the end of a buffer is kept for
    the next call. A frame is accepted only with a plausible header (known type, a length that
    matches the type and channel count) and a good CRC; everything else is skipped up to the
    next sync word, so one damaged frame never costs more than itself.
    """

    def __init__(self, n_channels: int | None, samples_per_frame: int | None = None):
        if n_channels is not None and not 1 <= n_channels <= 255:
            raise ValueError("n_channels must be 1..255")
        self.n_channels = n_channels
        self.samples_per_frame = samples_per_frame or None
        self._buf = b""
        self._locked = False        # a good frame has been seen
        self._skipping = 0          # bytes skipped since the last good frame
        self.total_frames = 0
        self.total_crc_errors = 0
        self.total_resyncs = 0
        self.total_discarded = 0

    @property
    def buffered_bytes(self) -> int:
        """Bytes held back for the next call (an incomplete frame)."""
        return len(self._buf)

    def reset(self) -> None:
        """Forget buffered bytes (after reopening the port)."""
        self._buf = b""
        self._locked = False
        self._skipping = 0

    def _result(self, controls: tuple = (), crc_errors: int = 0, resyncs: int = 0,
                discarded: int = 0) -> Parsed:
        m = self.n_channels or 0
        return Parsed(np.zeros(0, np.uint32), np.zeros(0, np.int64), np.zeros((0, m), np.uint8),
                      np.zeros((0, m), np.int32), controls, crc_errors, resyncs, discarded)

    def feed(self, data: bytes | bytearray | memoryview) -> Parsed:
        """Add bytes and return every complete good frame now available."""
        buf = self._buf + bytes(data) if self._buf else bytes(data)
        n = len(buf)
        if n < 2:
            self._buf = buf
            return self._result()
        a = np.frombuffer(buf, dtype=np.uint8)

        # 1. sync candidates, and the header fields of all of them at once
        cand = np.flatnonzero(a[:-1] == SYNC0)
        cand = cand[a[cand + 1] == SYNC1]
        readable = cand + DATA_HEADER_BYTES <= n
        c = cand[readable]
        unreadable = cand[~readable]
        typ = a[c + 2].astype(np.int64)
        ln = (a[c + 3].astype(np.int64) << 8) | a[c + 4]
        m = self.n_channels
        if m is not None:
            ns = a[c + 10].astype(np.int64)
            plausible = ((typ == FrameType.DATA) & (a[c + 9] == m) & (ns >= 1)
                         & (ln == 13 + m + 3 * m * ns))
            if self.samples_per_frame:
                plausible &= ns == self.samples_per_frame
        else:
            plausible = np.zeros(c.shape, dtype=bool)
        plausible |= (_CONTROL_LEN_TABLE[typ] == ln) & (ln > 0)
        complete = c + ln <= n
        check = plausible & complete

        # 2. CRC of all complete candidates, one vectorised pass per frame length
        valid = np.zeros(c.shape, dtype=bool)
        groups: dict[int, _Frames] = {}
        for L in np.unique(ln[check]).tolist():    # usually one or two lengths
            idx = np.flatnonzero(check & (ln == L))
            frames = _Frames(a, buf, c[idx], L)
            # the CRC register over the covered range followed by the CRC itself ends at zero
            valid[idx] = crc16_rows(frames.field(2, L - 2)) == 0
            groups[L] = frames

        pos = c[valid]
        end = pos + ln[valid]
        ftype = typ[valid]
        if pos.size > 1 and bool(np.any(pos[1:] < end[:-1])):
            pos, end, ftype = self._non_overlapping(pos, end, ftype)

        # 3. where the next call starts: the first candidate after the last good frame that
        # may still become a frame (header or body incomplete), else the end of the buffer
        # (keeping a trailing 0xA5, the first half of a sync word)
        last_end = int(end[-1]) if end.size else 0
        pending = np.concatenate((c[plausible & ~complete], unreadable))
        pending = pending[pending >= last_end]
        keep_from = int(pending.min()) if pending.size else n
        if keep_from == n and a[n - 1] == SYNC0 and n - 1 >= last_end:
            keep_from = n - 1

        # 4. bookkeeping: skipped bytes before each good frame and after the last one
        gaps = np.empty(pos.size + 1, dtype=np.int64)
        if pos.size:
            gaps[0] = pos[0]
            gaps[1:-1] = pos[1:] - end[:-1]
            gaps[-1] = keep_from - last_end
        else:
            gaps[0] = keep_from
        discarded = int(gaps.sum())
        resyncs = 0
        if pos.size:
            before = gaps[:-1].copy()
            before[0] += self._skipping
            resyncs = int(np.count_nonzero(before))
            if not self._locked and before[0]:
                resyncs -= 1               # the first lock after opening is not a resync
            self._locked = True
            self._skipping = int(gaps[-1])
        else:
            self._skipping += int(gaps[0])
        failed = c[check & ~valid]
        if failed.size:                    # count CRC failures outside every good frame
            if pos.size:
                i = np.searchsorted(pos, failed, side="right") - 1
                inside = (i >= 0) & (failed < end[np.maximum(i, 0)])
                failed = failed[~inside]
            failed = failed[failed < keep_from]
        crc_errors = int(failed.size)
        self._buf = buf[keep_from:]
        self.total_crc_errors += crc_errors
        self.total_resyncs += resyncs
        self.total_discarded += discarded

        # 5. decode: non-DATA frames one by one (rare), DATA frames all at once
        is_data = ftype == FrameType.DATA
        controls = tuple(
            ControlFrame(t, int.from_bytes(buf[p + 5:p + 9], "big"), buf[p + 9:e - 2])
            for p, e, t in zip(pos[~is_data].tolist(), end[~is_data].tolist(),
                               ftype[~is_data].tolist()))
        dpos, dend = pos[is_data], end[is_data]
        k = int(dpos.size)
        if k == 0:
            return self._result(controls, crc_errors, resyncs, discarded)
        assert m is not None
        self.total_frames += k
        flen = dend - dpos
        spf = (flen - 13 - m) // (3 * m)
        if bool(np.all(flen == flen[0])):
            L = int(flen[0])
            seq, status, codes = self._decode(groups[L].subset(dpos), m, int(spf[0]))
        else:                              # the front-end changed its frame size mid-buffer
            seq = np.empty(k, dtype=np.uint32)
            status = np.empty((k, m), dtype=np.uint8)
            offsets = np.concatenate(([0], np.cumsum(spf)))
            codes = np.empty((int(offsets[-1]), m), dtype=np.int32)
            for L in np.unique(flen).tolist():
                sel = np.flatnonzero(flen == L)
                s = (L - 13 - m) // (3 * m)
                gseq, gstatus, gcodes = self._decode(groups[L].subset(dpos[sel]), m, s)
                seq[sel], status[sel] = gseq, gstatus
                codes[(offsets[sel][:, None] + np.arange(s)).ravel()] = gcodes
        return Parsed(seq, spf.astype(np.int64), status, codes, controls, crc_errors, resyncs,
                      discarded)

    @staticmethod
    def _decode(frames: _Frames, m: int, s: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        k = frames.pos.size
        seq = frames.field(5, 1, ">u4")[:, 0].astype(np.uint32)
        status = frames.field(11, m) & np.uint8(STATUS_MASK)
        codes = frames.codes(11 + m, s * m).reshape(k * s, m)
        return seq, status, codes

    @staticmethod
    def _non_overlapping(pos: np.ndarray, end: np.ndarray, typ: np.ndarray):
        # two good frames overlap only if a sync word and a valid CRC occur by chance inside
        # another frame: keep the earlier one (rare path, a plain loop)
        keep = []
        last = -1
        for i, (p, e) in enumerate(zip(pos.tolist(), end.tolist())):
            if p >= last:
                keep.append(i)
                last = e
        k = np.asarray(keep, dtype=np.intp)
        return pos[k], end[k], typ[k]
