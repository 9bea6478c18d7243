"""What both serial front-end drivers share: opening the port, reading, stall and vanish
detection, and cutting the sample stream into blocks.

A subclass only turns bytes into samples (`_consume`), handing each contiguous run of samples
to `_emit(start_index, codes, quality)`. Everything else is here:

* the port is opened with ``serial.serial_for_url`` (device paths, /dev/serial/by-id/...,
  socket://host:port, loop://, spy://...), exclusively by default; an absent port, a busy port
  and a refused permission each raise `DriverIOError` with the port named;
* a read that fails (device unplugged, pty closed: EIO) or no good sample for
  ``stall_timeout_s`` raises `DriverIOError` after the samples already received have been
  delivered, so nothing received is lost to the reconnect;
* blocks have ``setup.block_samples`` rows of consecutive samples; a gap in the device's sample
  counter ends the current block early (a block never spans a gap, so the sample times
  computed from start_index and the period stay exact).
"""

from __future__ import annotations

import abc
import errno
import time
from collections import deque
from typing import Any, ClassVar, Mapping

import numpy as np

from straind.block import CODE_MAX, CODE_MIN, Block, Quality
from straind.drivers.base import DeviceSetup, Driver, DriverConfigError, DriverInfo, DriverIOError
from straind.schema import ConfigError, Field, Section, validate

try:  # pyserial is a dependency of the package; keep the import error readable if it is missing
    import serial
except ImportError as _exc:  # pragma: no cover - exercised only on a broken install
    serial = None
    _SERIAL_IMPORT_ERROR: Exception | None = _exc
else:
    _SERIAL_IMPORT_ERROR = None

__all__ = [
    "POLL_S",
    "PortBusy",
    "open_serial",
    "BlockAssembler",
    "SerialStreamDriver",
    "port_fields",
    "loopback_pattern",
]

#: Longest a single read waits for bytes; bounds how late read_block returns after its timeout.
POLL_S = 0.05
#: A read may return at most this many bytes.
MAX_READ_BYTES = 1 << 20


class PortBusy(DriverIOError):
    """Another process holds the port (exclusive lock)."""


def open_serial(url: str, baudrate: int, exclusive: bool = True, timeout_s: float = POLL_S,
                write_timeout_s: float = 1.0) -> Any:
    """Open `url` with pyserial, mapping every failure to a DriverIOError that names the port.

    Raises PortBusy when another process holds the port, DriverIOError when it is absent or
    cannot be opened, and DriverConfigError for a URL pyserial does not understand.
    """
    if serial is None:
        raise DriverIOError(f"pyserial is not installed: {_SERIAL_IMPORT_ERROR}")
    try:
        return serial.serial_for_url(url, baudrate=baudrate, timeout=timeout_s,
                                     write_timeout=write_timeout_s, exclusive=exclusive)
    except serial.SerialException as exc:
        text = str(exc)
        code = getattr(exc, "errno", None)
        if "exclusively lock" in text or code in (errno.EAGAIN, errno.EWOULDBLOCK, errno.EBUSY):
            raise PortBusy(f"serial port {url} is in use by another process ({text})") from None
        if code == errno.ENOENT:
            raise DriverIOError(f"serial port {url} not found: device absent or unplugged") \
                from None
        if code == errno.EACCES:
            raise DriverIOError(f"serial port {url}: permission denied (is the service user in "
                                "the group that owns the device, often 'dialout'?)") from None
        raise DriverIOError(f"serial port {url} cannot be opened: {text}") from None
    except ValueError as exc:
        raise DriverConfigError("options.port", f"{url!r}: {exc}") from None
    except OSError as exc:
        raise DriverIOError(f"serial port {url} cannot be opened: {exc}") from None


def port_fields(default_baudrate: int) -> dict[str, Field]:
    """The option fields every serial front-end takes."""
    return {
        "port": Field(str, doc="device path, /dev/serial/by-id/..., socket://host:port, loop://"),
        "baudrate": Field(int, default_baudrate, min=1, doc="line rate", unit="bit/s"),
        "exclusive": Field(bool, True, doc="lock the port against other processes"),
        "stall_timeout_s": Field(float, None, nullable=True, min=0.05, unit="s",
                                 doc="no good sample for this long = device gone; default "
                                     "max(1.5 s, three sample intervals per frame/line)"),
        "loopback_test_samples": Field(int, 0, min=0, max=1000,
                                       doc="at open, send this many samples of a known test "
                                           "pattern (for loop:// or a loopback plug: a self-test "
                                           "of port, protocol and parser); 0 = off"),
    }


def loopback_pattern(start_index: int, n: int, m: int) -> np.ndarray:
    """(n, m) int32 codes of the loopback self-test: a distinct value for every sample and
    channel, spread over the whole signed 24-bit range (never the two saturation codes)."""
    i = start_index + np.arange(n, dtype=np.int64)[:, None]
    j = np.arange(m, dtype=np.int64)[None, :]
    return (((i * 40_503 + j * 2_654_435) % ((1 << 24) - 2)) - (1 << 23) + 1).astype(np.int32)


class BlockAssembler:
    """Collects contiguous runs of samples and cuts them into blocks of a fixed size.

    A run that does not continue the previous one (a gap in the sample counter) closes the
    pending rows as a short block first.
    """

    def __init__(self, device: str, block_samples: int, period_ns: int, n_channels: int):
        self.device = device
        self.block_samples = max(1, int(block_samples))
        self.period_ns = int(period_ns)
        self.m = n_channels
        self.ready: deque[Block] = deque()
        self._codes: list[np.ndarray] = []
        self._quality: list[np.ndarray] = []
        self._pending = 0
        self._start: int | None = None
        self._seq = 0

    @property
    def pending_samples(self) -> int:
        return self._pending

    @property
    def next_index(self) -> int | None:
        """Sample index the pending run continues with (None when nothing is pending)."""
        return None if self._start is None else self._start + self._pending

    def add(self, start_index: int, codes: np.ndarray, quality: np.ndarray) -> None:
        """Append n consecutive samples beginning at sample `start_index`."""
        n = codes.shape[0]
        if n == 0:
            return
        if self._start is not None and start_index != self._start + self._pending:
            self.flush()
        if self._start is None:
            self._start = int(start_index)
        self._codes.append(codes)
        self._quality.append(quality)
        self._pending += n
        if self._pending >= self.block_samples:
            self._cut(full_only=True)

    def flush(self) -> None:
        """Close whatever is pending as a (possibly short) block."""
        if self._pending:
            self._cut(full_only=False)

    def _cut(self, full_only: bool) -> None:
        codes = np.concatenate(self._codes) if len(self._codes) > 1 else self._codes[0]
        quality = np.concatenate(self._quality) if len(self._quality) > 1 else self._quality[0]
        b = self.block_samples
        n_full = codes.shape[0] // b
        mono, wall = time.monotonic_ns(), time.time_ns()
        start = self._start
        assert start is not None
        for i in range(n_full):
            self._push(codes[i * b:(i + 1) * b], quality[i * b:(i + 1) * b], start + i * b,
                       mono, wall)
        rest = codes.shape[0] - n_full * b
        if rest and not full_only:
            self._push(codes[n_full * b:], quality[n_full * b:], start + n_full * b, mono, wall)
            rest = 0
        if rest:
            self._codes, self._quality = [codes[-rest:]], [quality[-rest:]]
            self._start = start + n_full * b
            self._pending = rest
        else:
            self._codes, self._quality = [], []
            self._start = None
            self._pending = 0

    def _push(self, codes: np.ndarray, quality: np.ndarray, start: int, mono: int,
              wall: int) -> None:
        self.ready.append(Block(device=self.device, data=np.ascontiguousarray(codes),
                                quality=np.ascontiguousarray(quality), start_index=int(start),
                                period_ns=self.period_ns, seq=self._seq, host_mono_ns=mono,
                                host_wall_ns=wall))
        self._seq += 1

    def pop(self) -> Block | None:
        return self.ready.popleft() if self.ready else None


def _validated(spec: Section, options: Mapping[str, Any], path: str) -> dict[str, Any]:
    try:
        return validate(spec, dict(options), path)
    except DriverConfigError:
        raise
    except ConfigError as exc:
        raise DriverConfigError(exc.path, exc.reason, exc.line) from None


class SerialStreamDriver(Driver):
    """Base of the serial front-end drivers (see the module docstring)."""

    DEFAULT_BAUDRATE: ClassVar[int] = 115200
    #: what static_info says about the subclass
    CAN_SHUNT: ClassVar[bool] = False
    PROTOCOL: ClassVar[str] = ""

    @classmethod
    def static_info(cls, options: Mapping[str, Any]) -> DriverInfo:
        return DriverInfo(summary=cls.summary, max_channels=cls.MAX_CHANNELS,
                          min_rate_hz=cls.MIN_RATE_HZ, max_rate_hz=cls.MAX_RATE_HZ,
                          native="code24", can_shunt=cls.CAN_SHUNT,
                          details={"protocol": cls.PROTOCOL,
                                   "port": str(options.get("port", ""))})

    @classmethod
    def check_setup(cls, setup: DeviceSetup, options: Mapping[str, Any], path: str) -> None:
        """Checks both serial drivers share; subclasses add their own after calling this."""
        super().check_setup(setup, options, path)
        _validated(cls.OPTIONS, options, f"{path}.options")
        if not setup.channels:
            raise DriverConfigError(f"{path}.channels", "needs at least one channel")
        if setup.block_samples < 1:
            raise DriverConfigError(f"{path}.block_samples", "must be >= 1")

    def __init__(self, setup: DeviceSetup, options: Mapping[str, Any]):
        super().__init__(setup, options)
        self.opts = _validated(self.OPTIONS, options, f"{setup.name}.options")
        self.columns = self._columns(setup)
        self.port_url: str = self.opts["port"]
        self._port: Any = None
        self._asm = BlockAssembler(setup.name, setup.block_samples, setup.period_ns,
                                   len(setup.channels))
        self._failure: DriverIOError | None = None
        self._last_good_mono = 0.0
        self._rx_bytes_since_good = 0
        self._last_raw = b""
        self._stall_s = 1.5
        self._dead = False            # a read failed: the port is gone, send nothing more

    @property
    def port(self) -> Any:
        """The open pyserial port (None when closed): for diagnostics and loop:// self-tests."""
        return self._port

    # -- helpers for subclasses ------------------------------------------------------------
    @classmethod
    def _columns(cls, setup: DeviceSetup) -> np.ndarray:
        """Stream column of each configured channel (channels[].options.column or its index)."""
        cols = []
        for ch in setup.channels:
            col = (ch.options or {}).get("column")
            cols.append(ch.index if col is None else int(col))
        return np.asarray(cols, dtype=np.intp)

    @classmethod
    def _check_columns(cls, setup: DeviceSetup, path: str, limit: int | None) -> None:
        cols = cls._columns(setup)
        seen: dict[int, int] = {}
        for i, col in enumerate(cols.tolist()):
            if col in seen:
                raise DriverConfigError(f"{path}.channels[{i}].options.column",
                                        f"column {col} is already used by channel {seen[col]}")
            if limit is not None and col >= limit:
                raise DriverConfigError(f"{path}.channels[{i}].options.column",
                                        f"column {col} is beyond the {limit} channels the "
                                        "front-end sends")
            seen[col] = i

    def _emit(self, start_index: int, codes: np.ndarray, quality: np.ndarray) -> None:
        """Hand over n consecutive samples (codes of the configured channels, in order)."""
        rails = (codes == CODE_MAX) | (codes == CODE_MIN)
        if rails.any():
            quality = quality | np.where(rails, np.uint8(Quality.SATURATED), np.uint8(0))
        self._asm.add(start_index, codes, quality)
        self._last_good_mono = time.monotonic()
        self._rx_bytes_since_good = 0
        self.count("samples", int(codes.shape[0]))

    def _default_stall_s(self) -> float:
        return max(1.5, 3.0 / self.setup.sample_rate_hz)

    def _write(self, data: bytes) -> None:
        port = self._port
        if port is None:
            raise DriverIOError(f"{self.port_url}: port is not open")
        try:
            port.write(data)
            port.flush()
        except Exception as exc:  # SerialException, SerialTimeoutException, OSError
            raise DriverIOError(f"serial port {self.port_url}: write failed ({exc})") from None

    def _read_some(self, want: int) -> bytes:
        """Up to `want` bytes (more if already waiting), waiting at most POLL_S; b'' if none.

        A failed read is remembered as the pending failure (raised once the samples received
        before it have been delivered).
        """
        port = self._port
        if port is None or self._failure is not None:
            return b""
        try:
            waiting = port.in_waiting
            data = port.read(min(MAX_READ_BYTES, max(1, want, waiting)))
        except Exception as exc:  # SerialException, OSError (EIO), TypeError on a closed fd
            self._dead = True
            self._failure = DriverIOError(f"serial port {self.port_url} vanished: {exc}")
            self.report("port_vanished", port=self.port_url, error=str(exc))
            return b""
        if data:
            self.count("bytes", len(data))
            self._rx_bytes_since_good += len(data)
            self._last_raw = data
        return data

    def _pump(self, wait_s: float) -> None:
        """Read and consume what arrives within about wait_s (at most POLL_S per read)."""
        deadline = time.monotonic() + wait_s
        while True:
            data = self._read_some(self._bytes_wanted())
            if data:
                self._consume(data)
                return
            if self._failure is not None or time.monotonic() >= deadline:
                return

    # -- hooks -----------------------------------------------------------------------------
    @abc.abstractmethod
    def _consume(self, data: bytes) -> None:
        """Turn bytes into samples (call `_emit`) and count/report stream errors."""

    def _bytes_wanted(self) -> int:
        """How many bytes to ask for in one read (enough to finish the pending block)."""
        return 1

    def _stall_hint(self, recent: bytes) -> str:
        """Why bytes arrive but no good sample, if the bytes tell (for the stall message)."""
        return ""

    def _after_open(self) -> None:
        """Start streaming (commands), reset parsers; called with the port open."""

    def _loopback_bytes(self, codes: np.ndarray) -> bytes:
        """The self-test pattern as this protocol sends it."""
        raise NotImplementedError

    def _before_close(self) -> None:
        """Stop streaming (commands); errors are ignored."""

    # -- the contract ----------------------------------------------------------------------
    def open(self) -> None:
        self.close()
        self._failure = None
        self._dead = False
        self._port = open_serial(self.port_url, int(self.opts["baudrate"]),
                                 bool(self.opts["exclusive"]))
        stall = self.opts.get("stall_timeout_s")
        self._stall_s = float(stall) if stall is not None else self._default_stall_s()
        self._last_good_mono = time.monotonic()
        self._rx_bytes_since_good = 0
        try:
            self._port.reset_input_buffer()
            self._after_open()
            n = int(self.opts.get("loopback_test_samples") or 0)
            if n:
                pattern = loopback_pattern(0, n, self._stream_channels())
                self._write(self._loopback_bytes(pattern))
        except BaseException:
            self.close()
            raise
        self.count("opens")

    def _stream_channels(self) -> int:
        """Channels (columns) the front-end sends."""
        return int(self.columns.max()) + 1 if len(self.columns) else 1

    def read_block(self, timeout_s: float) -> Block | None:
        if self._port is None:
            raise DriverIOError(f"{self.setup.name}: read_block() while the port is not open")
        deadline = time.monotonic() + max(0.0, float(timeout_s))
        while True:
            block = self._asm.pop()
            if block is not None:
                return block
            if self._failure is not None:
                self._asm.flush()            # deliver what arrived before the fault first
                block = self._asm.pop()
                if block is not None:
                    return block
                failure, self._failure = self._failure, None
                self.count("faults")
                raise failure
            now = time.monotonic()
            if now - self._last_good_mono > self._stall_s:
                got = self._rx_bytes_since_good
                why = (f"{got} bytes arrived but no good sample "
                       f"({self._stall_hint(self._last_raw) or 'wrong baudrate or protocol?'})"
                       if got else "no data")
                self._failure = DriverIOError(
                    f"serial port {self.port_url}: {why} for {self._stall_s:g} s (stalled)")
                self.report("stall", port=self.port_url, seconds=self._stall_s, bytes=got)
                continue
            if now >= deadline:
                return None
            self._pump(min(deadline - now, POLL_S))

    def close(self) -> None:
        port = self._port
        if port is None:
            return
        try:
            if not self._dead:
                self._before_close()
        except Exception:  # closing must not fail: the port may already be gone
            pass
        finally:
            self._port = None
            try:
                port.close()
            except Exception:
                pass
