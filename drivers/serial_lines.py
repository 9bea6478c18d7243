"""``serial-lines``: a bridge front-end that prints one text line of integer codes per sample.

Line format (ASCII, one sample per line, ended by LF; a CR before the LF is ignored):

    [counter SEP] code_0 SEP code_1 SEP ... code_n-1

* codes are signed decimal integers (an optional + or - then digits), 24-bit converter codes;
* SEP is, by default (``separator: null``), a comma or a run of spaces and tabs, spaces around
  a comma being ignored; an empty field (a leading comma, two commas with nothing between)
  makes the line bad, one trailing comma is allowed. With a separator character given
  (``separator: ";"``), each occurrence separates exactly one field, spaces around fields are
  ignored, and an empty field (also after a trailing separator) makes the line bad;
* with ``counter: true`` the first field is the front-end's sample counter (wrapping at
  ``counter_modulo``), which numbers the samples exactly and makes losses visible;
  without it every line is taken to be the next sample, and a line that cannot be read
  counts as one lost sample;
* a line starting with ``#`` is a message from the front-end (counted, never a sample);
  empty lines are ignored;
* a line that does not read (wrong field count, anything but digits and signs in a field,
  a value beyond 24 bits, too long) is counted (``bad_lines``) and skipped, never a sample.

Parsing is vectorised over everything that arrived: the bytes are classified with one table
lookup, tokens and lines are found with numpy, and the digits of all tokens are turned into
integers at once; no Python loop runs per line or per sample.

Device options: port (required), baudrate (default 115200), exclusive (true), stall_timeout_s,
separator (null), counter (false), counter_modulo (2**32), fields (0 = any number of fields
that covers every column; otherwise lines must have exactly this many, counter included),
max_line_bytes (4096). Channel options: column (0-based among the code fields, after the
counter; default: the channel's position).
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from straind.block import CODE_MAX, CODE_MIN, Quality
from straind.drivers.base import ChannelSetup, DeviceSetup, DriverConfigError
from straind.drivers.serialport import SerialStreamDriver, _validated, port_fields
from straind.schema import ConfigError, Field, Section

__all__ = ["SerialLines", "LineParser", "ParsedLines", "encode_lines"]

_OTHER, _DIGIT, _SIGN, _PAD, _SEP, _NL = 0, 1, 2, 3, 4, 5
#: longest token read as a number (sign included): 18 digits fit in int64
MAX_TOKEN_CHARS = 18


@dataclass(frozen=True)
class ParsedLines:
    """What one `LineParser.feed` call read.

    values:     (n, f) int64, the first f fields of every good line
    ordinal:    (n,) int64, the number of each good line among all sample lines so far
                (good and bad; comments and empty lines do not count)
    bad_lines:  lines that did not read
    messages:   lines starting with '#'
    sample_lines: good plus bad lines
    """

    values: np.ndarray
    ordinal: np.ndarray
    bad_lines: int
    messages: int
    sample_lines: int
    message_text: tuple[str, ...] = ()


class LineParser:
    """Incremental vectorised parser of text lines of integers.

    n_fields:   fields to return per line (counter included)
    separator:  None for "a comma or spaces and tabs", else one character
    exact:      if set, lines must have exactly this many fields
    skip_first: drop everything up to the first LF (a line cut when the port was opened)
    """

    def __init__(self, n_fields: int, separator: str | None = None, exact: int | None = None,
                 max_line_bytes: int = 4096, skip_first: bool = True):
        if n_fields < 1:
            raise ValueError("n_fields must be >= 1")
        self.n_fields = n_fields
        self.exact = exact or None
        self.max_line_bytes = max_line_bytes
        self.separator = separator
        cls = np.full(256, _OTHER, dtype=np.uint8)
        cls[ord("0"):ord("9") + 1] = _DIGIT
        cls[ord("+")] = cls[ord("-")] = _SIGN
        for c in " \t\r":
            cls[ord(c)] = _PAD
        if separator is None:
            cls[ord(",")] = _SEP
        else:
            if len(separator) != 1 or separator in "0123456789+-\n" or ord(separator) > 127:
                raise ValueError(f"separator must be one ASCII character other than digits, "
                                 f"signs and LF, got {separator!r}")
            cls[ord(separator)] = _SEP
        cls[ord("\n")] = _NL
        self._cls = cls
        self._tail = b""
        self._skip = skip_first
        self._ordinal = 0
        self.total_bad = 0
        self.total_messages = 0

    def reset(self, skip_first: bool = True) -> None:
        self._tail = b""
        self._skip = skip_first

    def _empty(self, bad: int = 0) -> ParsedLines:
        return ParsedLines(np.zeros((0, self.n_fields), np.int64), np.zeros(0, np.int64), bad,
                           0, bad)

    def feed(self, data: bytes) -> ParsedLines:
        buf = self._tail + bytes(data) if self._tail else bytes(data)
        last = buf.rfind(b"\n")
        if last < 0:
            if len(buf) > self.max_line_bytes:       # an endless line: drop it, count it once
                self._tail = b""
                bad = 0 if self._skip else 1
                self._skip = True
                self._ordinal += bad
                self.total_bad += bad
                return self._empty(bad)
            self._tail = buf
            return self._empty()
        chunk, self._tail = buf[:last + 1], buf[last + 1:]
        if self._skip:
            cut = chunk.find(b"\n")
            chunk = chunk[cut + 1:]
            self._skip = False
            if not chunk:
                return self._empty()
        return self._lines(chunk)

    def _lines(self, chunk: bytes) -> ParsedLines:
        a = np.frombuffer(chunk, dtype=np.uint8)
        n = a.size
        cls = self._cls[a]
        is_nl = cls == _NL
        nl = np.flatnonzero(is_nl)
        n_lines = nl.size
        lid = np.zeros(n, dtype=np.int64)           # line number of every byte
        lid[1:] = np.cumsum(is_nl[:-1])
        starts = np.concatenate(([0], nl[:-1] + 1))
        length = nl - starts                        # without the LF
        first = np.where(length > 0, a[np.minimum(starts, n - 1)], 0)
        message = first == ord("#")

        tok = (cls == _DIGIT) | (cls == _SIGN)
        prev_tok = np.zeros(n, dtype=bool)
        prev_tok[1:] = tok[:-1]
        next_tok = np.zeros(n, dtype=bool)
        next_tok[:-1] = tok[1:]
        ts = np.flatnonzero(tok & ~prev_tok)
        te = np.flatnonzero(tok & ~next_tok)
        tlen = te - ts + 1
        tline = lid[ts]
        ntok = np.bincount(tline, minlength=n_lines)

        bad = np.bincount(lid[cls == _OTHER], minlength=n_lines) > 0
        blank = (ntok == 0) & ~bad & ~message
        # signs only as the first character of a token with at least one digit after it
        sign_pos = np.flatnonzero(cls == _SIGN)
        if sign_pos.size:
            tok_of = np.searchsorted(ts, sign_pos, side="right") - 1
            misplaced = (ts[tok_of] != sign_pos) | (tlen[tok_of] < 2)
            bad[lid[sign_pos[misplaced]]] = True
        long_tok = tlen > MAX_TOKEN_CHARS
        if long_tok.any():
            bad[tline[long_tok]] = True
        sep_pos = np.flatnonzero(cls == _SEP)
        if sep_pos.size:
            # an empty field: a separator with nothing but spaces between it and the start of
            # the line or the previous separator
            solid = np.flatnonzero(cls != _PAD)
            before = np.searchsorted(solid, sep_pos) - 1
            prev_cls = np.where(before >= 0, cls[solid[np.maximum(before, 0)]], _NL)
            empty = (prev_cls == _SEP) | (prev_cls == _NL)
            bad[lid[sep_pos[empty]]] = True
            blank &= np.bincount(lid[sep_pos], minlength=n_lines) == 0
        if self.separator is not None:
            # every field holds exactly one token: no empty fields, no spaces inside a field
            nsep = np.bincount(lid[sep_pos], minlength=n_lines)
            bad |= (ntok != nsep + 1) & ~message & ~blank
        if self.exact:
            bad |= ntok != self.exact
        else:
            bad |= ntok < self.n_fields
        sample = ~message & ~blank
        bad &= sample
        good = sample & ~bad

        ordinal_all = self._ordinal + np.cumsum(sample) - 1
        self._ordinal += int(np.count_nonzero(sample))
        n_bad = int(np.count_nonzero(bad))
        n_msg = int(np.count_nonzero(message))
        self.total_bad += n_bad
        self.total_messages += n_msg
        texts: tuple[str, ...] = ()
        if n_msg:
            texts = tuple(chunk[s:s + ln].decode("ascii", "replace").strip()
                          for s, ln in zip(starts[message][:8].tolist(),
                                           length[message][:8].tolist()))

        f = self.n_fields
        good_lines = np.flatnonzero(good)
        if good_lines.size == 0:
            return ParsedLines(np.zeros((0, f), np.int64), np.zeros(0, np.int64), n_bad, n_msg,
                               int(np.count_nonzero(sample)), texts)
        # the first f tokens of every good line
        first_tok = np.concatenate(([0], np.cumsum(ntok)[:-1]))
        rank = np.arange(ts.size) - first_tok[tline]
        pick = good[tline] & (rank < f)
        s, e = ts[pick], te[pick]
        width = int((e - s).max()) + 1
        back = np.arange(width)
        idx = e[:, None] - back[None, :]             # digits from the least significant up
        inside = idx >= s[:, None]
        ch = a[np.where(inside, idx, 0)].astype(np.int64)
        digit = np.where(inside & (ch >= 48) & (ch <= 57), ch - 48, 0)
        value = (digit * (10 ** back)[None, :]).sum(axis=1)
        value = np.where(a[s] == ord("-"), -value, value)
        return ParsedLines(value.reshape(-1, f), ordinal_all[good_lines], n_bad, n_msg,
                           int(np.count_nonzero(sample)), texts)


def encode_lines(codes: np.ndarray, counter_start: int | None = None, separator: str = " ",
                 counter_modulo: int = 1 << 32, line_end: str = "\n") -> bytes:
    """Text lines for (n, m) integer codes, with a leading counter if counter_start is given."""
    codes = np.asarray(codes, dtype=np.int64)
    n = codes.shape[0]
    if n == 0:
        return b""
    cols = [codes[:, j].astype(str) for j in range(codes.shape[1])]
    if counter_start is not None:
        cnt = (int(counter_start) + np.arange(n, dtype=np.int64)) % counter_modulo
        cols.insert(0, cnt.astype(str))
    table = np.stack(cols, axis=1)
    lines = [separator.join(row) for row in table.tolist()]
    return (line_end.join(lines) + line_end).encode("ascii")


def _separator(value: Any, path: str, line: int | None) -> str:
    if not isinstance(value, str) or len(value) != 1 or value in "0123456789+-\n" \
            or ord(value) > 127:
        raise ConfigError(path, "separator must be one ASCII character (not a digit, sign or "
                          f"newline), or null for spaces/tabs/commas; got {value!r}", line)
    return value


class SerialLines(SerialStreamDriver):
    """Bridge front-end printing one line of integer codes per sample over a serial port."""

    summary = "serial bridge front-end, one text line of integer codes per sample"
    DEFAULT_BAUDRATE = 115200
    OPTIONS = Section({
        **port_fields(115200),
        "separator": Field(_separator, None, nullable=True,
                           doc="field separator (null: runs of spaces, tabs, commas)"),
        "counter": Field(bool, False, doc="the first field is the sample counter"),
        "counter_modulo": Field(int, 1 << 32, min=2, doc="the counter wraps to 0 at this value"),
        "fields": Field(int, 0, min=0, doc="exact fields per line, counter included (0 = any "
                        "count covering every column)"),
        "max_line_bytes": Field(int, 4096, min=16, unit="byte", doc="longer lines are dropped"),
    })
    CHANNEL_OPTIONS = Section({
        "column": Field(int, None, nullable=True, min=0,
                        doc="position of the channel among the code fields (after the counter)"),
    })
    MAX_CHANNELS = 255
    CAN_SHUNT = False
    PROTOCOL = "text lines of integer codes"
    MIN_RATE_HZ = 0.001
    MAX_RATE_HZ = 100_000.0

    def __init__(self, setup: DeviceSetup, options: Mapping[str, Any]):
        super().__init__(setup, options)
        self._has_counter = bool(self.opts["counter"])
        self._modulo = int(self.opts["counter_modulo"])
        self._n_fields = int(self.columns.max()) + 1 + int(self._has_counter) \
            if len(self.columns) else 1
        self._parser: LineParser | None = None
        self._last_count: int | None = None
        self._last_index = -1
        self._ordinal_base = 0

    @classmethod
    def check_setup(cls, setup: DeviceSetup, options: Mapping[str, Any], path: str) -> None:
        super().check_setup(setup, options, path)
        opts = _validated(cls.OPTIONS, options, f"{path}.options")
        exact = int(opts["fields"])
        limit = exact - int(opts["counter"]) if exact else None
        if limit is not None and limit < 1:
            raise DriverConfigError(f"{path}.options.fields", "leaves no field for a code")
        cls._check_columns(setup, path, limit)

    @classmethod
    def example(cls) -> tuple[DeviceSetup, dict[str, Any]]:
        """Two channels on loop:// with the loopback self-test pattern (contract test)."""
        chans = tuple(ChannelSetup(f"c{k}", k, {}, {"column": None}) for k in range(2))
        setup = DeviceSetup("example", 100.0, 10, chans, {"adc": {"gain": 128}})
        return setup, _validated(cls.OPTIONS, {"port": "loop://", "counter": True,
                                               "loopback_test_samples": 10}, "example.options")

    def _loopback_bytes(self, codes: np.ndarray) -> bytes:
        # an empty first line: the driver drops the first line after opening
        sep = self.opts["separator"] or " "
        return b"\n" + encode_lines(codes, 0 if self._has_counter else None, sep, self._modulo)

    def _after_open(self) -> None:
        self._parser = LineParser(self._n_fields, self.opts["separator"],
                                  int(self.opts["fields"]) or None,
                                  int(self.opts["max_line_bytes"]), skip_first=True)
        # without a counter, line numbers continue after a reopen of this instance
        self._ordinal_base = self._last_index + 1

    def _bytes_wanted(self) -> int:
        need = self.setup.block_samples - self._asm.pending_samples
        return max(1, need * (8 * self._n_fields + 2))

    def _consume(self, data: bytes) -> None:
        parser = self._parser
        if parser is None:
            return
        got = parser.feed(data)
        if got.messages:
            self.count("message_lines", got.messages)
            for text in got.message_text:
                self.report("frontend_message", port=self.port_url, text=text)
        bad = got.bad_lines
        values = got.values
        if values.shape[0]:
            codes = values[:, int(self._has_counter):]
            if not np.array_equal(self.columns, np.arange(codes.shape[1])):
                codes = codes[:, self.columns]
            in_range = np.all((codes >= CODE_MIN) & (codes <= CODE_MAX), axis=1)
            if self._has_counter:
                cnt = values[:, 0]
                in_range &= (cnt >= 0) & (cnt < self._modulo)
            if not in_range.all():
                bad += int(np.count_nonzero(~in_range))
                codes, values = codes[in_range], values[in_range]
                ordinal = got.ordinal[in_range]
            else:
                ordinal = got.ordinal
            if codes.shape[0]:
                if self._has_counter:
                    index = self._unwrap(values[:, 0])
                else:
                    index = self._ordinal_base + ordinal
                self._deliver(index, codes.astype(np.int32))
        if bad:
            self.count("bad_lines", bad)

    def _unwrap(self, counter: np.ndarray) -> np.ndarray:
        """Sample numbers from the wrapping counter (backwards steps start a new epoch)."""
        mod = self._modulo
        if self._last_count is None:
            self._last_count = int(counter[0]) - 1
            self._last_index = int(counter[0]) - 1
        prev = np.concatenate(([self._last_count], counter[:-1]))
        d = (counter - prev) % mod
        back = d >= mod // 2
        if back.any():
            # a counter that went backwards (front-end restarted) continues right after the
            # last sample; duplicates (d == 0) keep their index and are dropped in _deliver
            d = np.where(back, 1, d)
            self.count("counter_resets", int(np.count_nonzero(back)))
            self.report("frontend_restart", port=self.port_url,
                        lines=int(np.count_nonzero(back)))
        index = self._last_index + np.cumsum(d)
        self._last_count = int(counter[-1])
        return index

    def _deliver(self, index: np.ndarray, codes: np.ndarray) -> None:
        steps = np.diff(np.concatenate(([self._last_index], index)))
        if np.any(steps < 1):                      # duplicates or disorder: keep increasing only
            keep = index > np.maximum.accumulate(np.concatenate(([self._last_index], index)))[:-1]
            self.count("duplicate_lines", int(np.count_nonzero(~keep)))
            index, codes = index[keep], codes[keep]
            if index.size == 0:
                return
            steps = np.diff(np.concatenate(([self._last_index], index)))
        quality = np.zeros(codes.shape, dtype=np.uint8)
        gaps = np.flatnonzero(steps > 1)
        if gaps.size:
            quality[gaps] |= np.uint8(Quality.AFTER_GAP)
            lost = steps[gaps] - 1
            self.count("lost_samples", int(lost.sum()))
            for g, n_lost in zip(gaps.tolist(), lost.tolist()):
                self.report("gap", cause="line counter" if self._has_counter else "bad line",
                            samples=int(n_lost), first_lost_index=int(index[g]) - int(n_lost),
                            first_index_after=int(index[g]))
        cuts = [0] + gaps.tolist() + [index.size]
        for a, b in zip(cuts[:-1], cuts[1:]):
            if b > a:
                self._emit(int(index[a]), codes[a:b], quality[a:b])
        self._last_index = int(index[-1])
        self._last_good_mono = time.monotonic()
