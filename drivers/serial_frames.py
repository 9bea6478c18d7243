"""``serial-frames``: a 24-bit bridge front-end that streams straind's framed binary protocol
over a serial port (USB CDC, UART, or a TCP bridge).

The protocol (byte layout, CRC, commands) is in `straind.drivers.framing`. The driver:

* parses whole read buffers with the vectorised `FrameParser` (no per-frame Python loop);
* takes sample numbers from the front-end's frame counter (unwrapped past 2**32) times the
  samples per frame, never from the host's arrival time; a gap in the counter is counted
  (``lost_frames``, ``lost_samples``), reported as a ``gap`` event and marks the first sample
  after it AFTER_GAP; a block never spans a gap;
* copies the per-channel status bits into the quality flags (saturated, open bridge,
  excitation fault, shunt on);
* counts CRC errors, resyncs and discarded bytes (``stream_errors`` events, at most one per
  second);
* at open optionally sets the rate and the PGA gain and sends START, waiting for each ACK;
  sends STOP at close; switches shunt resistors on request (``set_shunt``), waiting for the ACK.

Device options (``devices[].options``):

    port              required: /dev/ttyACM0, /dev/serial/by-id/..., socket://host:port, loop://
    baudrate          default 921600 (ignored by USB CDC devices and sockets)
    exclusive         default true: lock the port so that a second process cannot read it
    stall_timeout_s   no good frame for this long = device gone (default max(1.5 s, three
                      frame intervals))
    frame_channels    channels in each frame (default: the highest column + 1)
    samples_per_frame accept only frames with this many samples (default 0 = any)
    start_command     send START at open and STOP at close (default true)
    set_rate          send SET_RATE with the device's sample_rate_hz at open (default false)
    set_gain          send SET_GAIN with the device's adc.gain at open (default false)
    command_timeout_s wait this long for an ACK (default 1.0), then retry once

Channel options (``devices[].channels[].options``):

    column            the channel's position in the frame (default: its position in the list)

Within one process the driver remembers the last frame counter per device and port, so the
sequence gap across a reconnect is counted exactly too.
"""

from __future__ import annotations

import random
import threading
import time
from typing import Any, ClassVar, Mapping

import numpy as np

from straind.block import Quality
from straind.drivers.base import (ChannelSetup, DeviceSetup, DriverConfigError, DriverError,
                                  DriverIOError)
from straind.drivers.framing import (SEQ_MODULO, ControlFrame, FrameParser, FrameType,
                                     NakReason, Parsed, data_frame_bytes, encode_command,
                                     encode_data_frames, sniff_data_format)
from straind.drivers.serialport import POLL_S, SerialStreamDriver, _validated, port_fields
from straind.schema import Field, Section

__all__ = ["SerialFrames", "CommandRefused"]

_HALF = SEQ_MODULO // 2


class CommandRefused(DriverError):
    """The front-end answered a command with NAK."""


class SerialFrames(SerialStreamDriver):
    """Bridge front-end speaking straind's framed binary protocol over a serial port."""

    summary = ("serial bridge front-end, straind framed binary protocol (24-bit codes, CRC-16, "
               "frame counter, status bits, commands with ACK)")
    DEFAULT_BAUDRATE = 921600
    OPTIONS = Section({
        **port_fields(921600),
        "frame_channels": Field(int, 0, min=0, max=255,
                                doc="channels per frame (0 = highest column + 1)"),
        "samples_per_frame": Field(int, 0, min=0, max=255,
                                   doc="accept only this many samples per frame (0 = any)"),
        "start_command": Field(bool, True, doc="send START at open, STOP at close"),
        "set_rate": Field(bool, False, doc="send SET_RATE (sample_rate_hz) at open"),
        "set_gain": Field(bool, False, doc="send SET_GAIN (adc.gain) at open"),
        "command_timeout_s": Field(float, 1.0, min=0.01, unit="s",
                                   doc="wait this long for an acknowledgement"),
    })
    CHANNEL_OPTIONS = Section({
        "column": Field(int, None, nullable=True, min=0, max=254,
                        doc="position of the channel in the frame"),
    })
    MAX_CHANNELS = 255
    CAN_SHUNT = True
    PROTOCOL = "straind framed binary, CRC-16/CCITT-FALSE"
    MIN_RATE_HZ = 0.001
    MAX_RATE_HZ = 1_000_000.0

    #: (device, port) -> last frame counter state, so a reconnect's gap is counted exactly
    _resume: ClassVar[dict[tuple[str, str], dict[str, Any]]] = {}
    _resume_lock: ClassVar[threading.Lock] = threading.Lock()

    def __init__(self, setup: DeviceSetup, options: Mapping[str, Any]):
        super().__init__(setup, options)
        fc = int(self.opts["frame_channels"])
        self.frame_channels = fc if fc else int(self.columns.max()) + 1 if len(self.columns) else 1
        self._identity = bool(np.array_equal(self.columns, np.arange(self.frame_channels)))
        self._parser: FrameParser | None = None
        self._acks: dict[int, ControlFrame] = {}
        self._cmd_id = random.getrandbits(32)
        self._last_seq: int | None = None
        self._last_useq = 0
        self._ns: int | None = None
        self._offset = 0
        self._last_frame_mono = 0.0
        self._after_gap = False
        self._err_reported = (0, 0, 0)
        self._err_report_mono = 0.0

    @property
    def frame_counter(self) -> int | None:
        """Unwrapped counter of the last good frame parsed (None before the first)."""
        return None if self._last_seq is None else self._last_useq

    # -- description and checks --------------------------------------------------------------
    @classmethod
    def check_setup(cls, setup: DeviceSetup, options: Mapping[str, Any], path: str) -> None:
        super().check_setup(setup, options, path)
        opts = _validated(cls.OPTIONS, options, f"{path}.options")
        fc = int(opts["frame_channels"]) or None
        cls._check_columns(setup, path, fc)
        if opts["set_gain"] and not (setup.config.get("adc") or {}).get("gain"):
            raise DriverConfigError(f"{path}.adc.gain", "set_gain needs adc.gain")
        spf = int(opts["samples_per_frame"])
        stall = opts["stall_timeout_s"]
        if spf and stall is not None and stall < 2.0 * spf / setup.sample_rate_hz:
            raise DriverConfigError(f"{path}.options.stall_timeout_s",
                                    f"{stall:g} s is shorter than two frames "
                                    f"({spf} samples at {setup.sample_rate_hz:g} Hz)")

    @classmethod
    def example(cls) -> tuple[DeviceSetup, dict[str, Any]]:
        """Two channels on loop:// with the loopback self-test pattern (contract test)."""
        chans = tuple(ChannelSetup(f"c{k}", k, {}, {"column": None}) for k in range(2))
        setup = DeviceSetup("example", 1000.0, 10, chans, {"adc": {"gain": 128}})
        return setup, _validated(cls.OPTIONS, {"port": "loop://", "start_command": False,
                                               "loopback_test_samples": 10}, "example.options")

    def _stream_channels(self) -> int:
        return self.frame_channels

    def _loopback_bytes(self, codes: np.ndarray) -> bytes:
        return encode_data_frames(0, codes, 0, 1)

    def _stall_hint(self, recent: bytes) -> str:
        fmt = sniff_data_format(recent)
        if fmt is None:
            return ""
        m, s = fmt
        spf = int(self.opts["samples_per_frame"])
        if m != self.frame_channels:
            return (f"the front-end sends {m} channels per frame, this device expects "
                    f"{self.frame_channels}: set options.frame_channels or the channel list")
        if spf and s != spf:
            return (f"the front-end sends {s} samples per frame, options.samples_per_frame "
                    f"is {spf}")
        return ""

    def _default_stall_s(self) -> float:
        spf = int(self.opts["samples_per_frame"]) or 1
        return max(1.5, 3.0 * spf / self.setup.sample_rate_hz)

    # -- streaming ---------------------------------------------------------------------------
    def _after_open(self) -> None:
        spf = int(self.opts["samples_per_frame"]) or None
        self._parser = FrameParser(self.frame_channels, spf)
        self._acks.clear()
        if self.opts["set_rate"]:
            self._command(FrameType.SET_RATE, "SET_RATE", rate_hz=self.setup.sample_rate_hz)
        if self.opts["set_gain"]:
            gain = int((self.setup.config.get("adc") or {})["gain"])
            self._command(FrameType.SET_GAIN, "SET_GAIN", channel=None, value=gain)
        if self.opts["start_command"]:
            self._command(FrameType.START, "START")
        self._last_good_mono = time.monotonic()

    def _before_close(self) -> None:
        if self.opts["start_command"] and self._port is not None:
            self._cmd_id = (self._cmd_id + 1) % SEQ_MODULO
            self._write(encode_command(FrameType.STOP, self._cmd_id))

    def _bytes_wanted(self) -> int:
        ns = self._ns or int(self.opts["samples_per_frame"]) or 1
        frame = data_frame_bytes(self.frame_channels, ns)
        need = self.setup.block_samples - self._asm.pending_samples
        buffered = self._parser.buffered_bytes if self._parser is not None else 0
        return max(1, -(-need // ns) * frame - buffered)

    def _consume(self, data: bytes) -> None:
        parser = self._parser
        if parser is None:
            return
        parsed = parser.feed(data)
        for cf in parsed.controls:
            self._on_control(cf)
        if parsed.n_frames:
            self.count("frames", parsed.n_frames)
            self._frames(parsed)
        if parsed.crc_errors:
            self.count("crc_errors", parsed.crc_errors)
        if parsed.resyncs:
            self.count("resyncs", parsed.resyncs)
        if parsed.discarded_bytes:
            self.count("discarded_bytes", parsed.discarded_bytes)
        self._report_stream_errors(parser)

    def _report_stream_errors(self, parser: FrameParser) -> None:
        now_counts = (parser.total_crc_errors, parser.total_resyncs, parser.total_discarded)
        if now_counts == self._err_reported:
            return
        now = time.monotonic()
        if now - self._err_report_mono < 1.0:
            return
        prev = self._err_reported
        self.report("stream_errors", port=self.port_url, crc_errors=now_counts[0] - prev[0],
                    resyncs=now_counts[1] - prev[1], discarded_bytes=now_counts[2] - prev[2])
        self._err_reported = now_counts
        self._err_report_mono = now

    def _on_control(self, cf: ControlFrame) -> None:
        if cf.frame_type in (FrameType.ACK, FrameType.NAK):
            if len(self._acks) > 64:
                self._acks.clear()
            self._acks[cf.seq] = cf
        else:
            self.count("unexpected_frames")   # e.g. our own commands echoed by loop://

    # -- sequence numbers -> sample numbers --------------------------------------------------
    def _frames(self, parsed: Parsed) -> None:
        seq = parsed.seq.astype(np.int64)
        spf = parsed.samples_per_frame
        rows = np.concatenate(([0], np.cumsum(spf)))
        bounds = np.concatenate(([0], np.flatnonzero(np.diff(spf)) + 1, [seq.size])).tolist()
        for a, b in zip(bounds[:-1], bounds[1:]):   # runs of one frame size: nearly always one
            self._run(seq[a:b], int(spf[a]), parsed.codes[rows[a]:rows[b]], parsed.status[a:b])

    @property
    def _resumable(self) -> bool:
        # a loopback carries no front-end counter worth continuing
        return not (self.port_url.startswith("loop://") or self.opts["loopback_test_samples"])

    def _start_state(self, first_seq: int, ns: int) -> None:
        key = (self.setup.name, self.port_url)
        with self._resume_lock:
            prev = self._resume.get(key) if self._resumable else None
        if prev is not None:
            self._last_seq, self._last_useq = prev["seq"], prev["useq"]
            self._ns, self._offset = prev["ns"], prev["offset"]
            self._last_frame_mono = prev["mono"]
        else:
            self._last_seq = (first_seq - 1) % SEQ_MODULO
            self._last_useq = first_seq - 1
            self._ns, self._offset = ns, 0
            self._last_frame_mono = time.monotonic()

    def _run(self, seq: np.ndarray, ns: int, codes: np.ndarray, status: np.ndarray) -> None:
        if self._last_seq is None:
            self._start_state(int(seq[0]), ns)
        assert self._ns is not None and self._last_seq is not None
        if ns != self._ns:
            # the front-end changed its frame size: keep sample numbers continuous
            d0 = (int(seq[0]) - self._last_seq) % SEQ_MODULO
            end = (self._last_useq + 1) * self._ns + self._offset
            self._offset = end - (self._last_useq + 1) * ns
            self.report("frame_format", samples_per_frame=ns, previous=self._ns,
                        frames_between=d0 - 1)
            self._ns = ns
        i = 0
        k = seq.size
        while i < k:
            prev = np.concatenate(([self._last_seq], seq[i:k - 1]))
            d = (seq[i:] - prev) % SEQ_MODULO
            bad = np.flatnonzero((d == 0) | (d >= _HALF))
            j = i + int(bad[0]) if bad.size else k
            if j > i:
                self._good_run(seq[i:j], d[:j - i], ns, codes[i * ns:j * ns], status[i:j])
            if j >= k:
                break
            if d[j - i] == 0:
                self.count("duplicate_frames")
            else:
                self._restart(int(seq[j]), ns)
                self._good_run(seq[j:j + 1], np.ones(1, np.int64), ns,
                               codes[j * ns:(j + 1) * ns], status[j:j + 1])
            i = j + 1

    def _restart(self, seq: int, ns: int) -> None:
        """The frame counter went backwards: the front-end restarted. Estimate the samples
        missed from the host clock (the only clock left), at least none."""
        elapsed_s = max(0.0, time.monotonic() - self._last_frame_mono)
        missed = max(0, int(round(elapsed_s * self.setup.sample_rate_hz / ns)) - 1)
        self.count("frontend_restarts")
        self.report("frontend_restart", port=self.port_url, previous_seq=self._last_seq,
                    seq=seq, estimated_frames_missed=missed)
        if missed:
            self.count("lost_frames", missed)
            self.count("lost_samples", missed * ns)
        self._last_useq += missed
        self._last_seq = (seq - 1) % SEQ_MODULO
        self._after_gap = True

    def _good_run(self, seq: np.ndarray, d: np.ndarray, ns: int, codes: np.ndarray,
                  status: np.ndarray) -> None:
        useq = self._last_useq + np.cumsum(d)
        first = useq * ns + self._offset                 # sample number of each frame's first
        cols = self.columns
        if not self._identity:
            codes = codes[:, cols]
            status = status[:, cols]
        quality = np.repeat(status, ns, axis=0)
        gaps = np.flatnonzero(d > 1)
        if self._after_gap:
            quality[0] |= np.uint8(Quality.AFTER_GAP)
            self._after_gap = False
        if gaps.size:
            quality[gaps * ns] |= np.uint8(Quality.AFTER_GAP)
            lost = d[gaps] - 1
            self.count("lost_frames", int(lost.sum()))
            self.count("lost_samples", int(lost.sum()) * ns)
            for g, n_lost in zip(gaps.tolist(), lost.tolist()):
                self.report("gap", cause="frame counter", frames=int(n_lost),
                            samples=int(n_lost) * ns,
                            first_lost_index=int(first[g]) - int(n_lost) * ns,
                            first_index_after=int(first[g]))
        cuts = [0] + gaps.tolist() + [seq.size]
        for a, b in zip(cuts[:-1], cuts[1:]):
            if b > a:
                self._emit(int(first[a]), codes[a * ns:b * ns], quality[a * ns:b * ns])
        self._last_seq = int(seq[-1])
        self._last_useq = int(useq[-1])
        self._last_frame_mono = time.monotonic()
        if not self._resumable:
            return
        with self._resume_lock:
            self._resume[(self.setup.name, self.port_url)] = {
                "seq": self._last_seq, "useq": self._last_useq, "ns": ns,
                "offset": self._offset, "mono": self._last_frame_mono}

    # -- commands ----------------------------------------------------------------------------
    def _command(self, ftype: FrameType, what: str, attempts: int = 2,
                 **args: Any) -> ControlFrame:
        """Send a command and wait for its ACK (data arriving meanwhile is kept)."""
        if self._port is None:
            raise DriverIOError(f"{self.setup.name}: {what} before open()")
        timeout_s = float(self.opts["command_timeout_s"])
        for _ in range(attempts):
            self._cmd_id = (self._cmd_id + 1) % SEQ_MODULO
            cid = self._cmd_id
            self._write(encode_command(ftype, cid, **args))
            deadline = time.monotonic() + timeout_s
            while True:
                cf = self._acks.pop(cid, None)
                if cf is not None and cf.command == int(ftype):
                    if cf.frame_type == FrameType.NAK:
                        try:
                            why = NakReason(cf.reason).name.lower().replace("_", " ")
                        except ValueError:
                            why = f"reason {cf.reason}"
                        raise CommandRefused(f"front-end on {self.port_url} refused {what}: {why}")
                    self.count("commands_acked")
                    return cf
                if self._failure is not None:
                    raise DriverIOError(f"{what}: {self._failure}")
                now = time.monotonic()
                if now >= deadline:
                    break
                self._pump(min(POLL_S, deadline - now))
            self.count("command_timeouts")
        raise DriverIOError(f"front-end on {self.port_url} did not acknowledge {what} within "
                            f"{timeout_s:g} s ({attempts} attempts)")

    def set_shunt(self, channel_index: int, on: bool) -> None:
        """Switch the shunt resistor of one channel and wait for the front-end's ACK."""
        pos = [i for i, ch in enumerate(self.setup.channels) if ch.index == channel_index]
        if not pos:
            raise IndexError(f"no channel with index {channel_index}")
        col = int(self.columns[pos[0]])
        self._command(FrameType.SHUNT, f"SHUNT {'on' if on else 'off'} (channel {col})",
                      channel=col, value=1 if on else 0)
        self.report("shunt", channel=self.setup.channels[pos[0]].name, on=bool(on))

    def set_gain(self, gain: int, channel_index: int | None = None) -> None:
        """Set the PGA gain of one channel (or all) and wait for the ACK."""
        col = None if channel_index is None else int(self.columns[channel_index])
        self._command(FrameType.SET_GAIN, f"SET_GAIN {gain}", channel=col, value=int(gain))
