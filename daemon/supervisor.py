"""Supervision of one device: open the driver, pump blocks through the chain to the sinks, and
reopen with capped backoff when the driver faults, recording the gap.

Each device runs in its own thread (`DeviceRunner`). Everything per block is vectorised; the
thread never waits on the disk or the network (sinks take blocks without blocking).
"""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Protocol, Sequence

import numpy as np

from straind.block import UNUSABLE, Block, EngineeringBlock, Quality
from straind.chain import DeviceChain
from straind.drivers.base import (ChannelSetup, DeviceSetup, Driver, DriverError, DriverIOError,
                                  EndOfStream)
from straind.events import Event, make_event
from straind.timebase import Timebase

__all__ = ["Sink", "DeviceRunner", "TareRequest", "Backoff", "device_setup"]

log = logging.getLogger("straind.supervisor")


class Sink(Protocol):
    """Where engineering blocks go (HDF5 store, MQTT feed, alarms). Never blocks."""

    def submit(self, block: EngineeringBlock) -> bool: ...

    def record_event(self, event: Event) -> None: ...


def device_setup(dev: Mapping[str, Any]) -> DeviceSetup:
    """The DeviceSetup a driver is constructed with, from a validated device configuration."""
    return DeviceSetup(
        name=dev["name"], sample_rate_hz=float(dev["sample_rate_hz"]),
        block_samples=int(dev["block_samples"]),
        channels=tuple(ChannelSetup(c["name"], i, c, c["options"])
                       for i, c in enumerate(dev["channels"])),
        config=dev)


class Backoff:
    """Capped exponential backoff: 0.5 s, 1 s, 2 s ... up to cap_s; reset after success."""

    def __init__(self, first_s: float = 0.5, cap_s: float = 30.0):
        self.first_s, self.cap_s = first_s, cap_s
        self.next_s = first_s

    def wait_s(self) -> float:
        out = self.next_s
        self.next_s = min(self.cap_s, self.next_s * 2)
        return out

    def reset(self) -> None:
        self.next_s = self.first_s


@dataclass
class TareRequest:
    """A zero to be taken on some channels: average `samples` usable samples of each."""

    channels: list[int]
    samples: int
    origin: str
    done: threading.Event = field(default_factory=threading.Event)
    sums: np.ndarray | None = None
    counts: np.ndarray | None = None
    result: dict[str, Any] = field(default_factory=dict)
    error: str | None = None


@dataclass
class CaptureRequest:
    """Collect `samples` usable engineering values of one channel, with the shunt on or off."""

    channel: int
    samples: int
    shunt_on: bool
    done: threading.Event = field(default_factory=threading.Event)
    chunks: list = field(default_factory=list)
    ratio_chunks: list = field(default_factory=list)
    count: int = 0

    def values(self) -> np.ndarray:
        return np.concatenate(self.chunks)[: self.samples] if self.chunks else np.empty(0)

    def ratios(self) -> np.ndarray:
        """Untared bridge ratios (V/V) of the same samples."""
        return np.concatenate(self.ratio_chunks)[: self.samples] if self.ratio_chunks else np.empty(0)


class DeviceRunner(threading.Thread):
    """Runs one device until stopped. Not a daemon thread: it closes its driver on the way out."""

    def __init__(self, device: Mapping[str, Any], driver_cls: type[Driver], chain: DeviceChain,
                 sinks: Sequence[Sink], emit: Callable[[Event], None],
                 on_zero: Callable[["DeviceRunner", int, float, int, str], dict] | None = None,
                 wall_clock_ns: Callable[[], int] = time.time_ns,
                 heartbeat: Callable[[], None] | None = None,
                 clock_synced: Callable[[], bool] | None = None):
        super().__init__(name=f"straind-dev-{device['name']}", daemon=False)
        self.device = device
        self.name_ = device["name"]
        self.driver_cls = driver_cls
        self.chain = chain
        self.sinks = list(sinks)
        self.emit = emit
        self.on_zero = on_zero
        self.heartbeat = heartbeat
        #: asked whenever the timebase anchors; False flags the run's samples CLOCK_UNSYNCED
        self.clock_synced = clock_synced
        self.anchor_unsynced = False
        self.setup = device_setup(device)
        self.timebase = Timebase(self.setup.period_ns, wall_clock_ns)
        self.stop_event = threading.Event()
        self.driver: Driver | None = None
        self.state = "starting"
        self.blocks = 0
        self.samples = 0
        self.reconnects = 0
        self.last_error = ""
        self.last_values: np.ndarray | None = None
        self.last_time_ns: int | None = None
        self.last_block_mono = time.monotonic()
        self._rate_window: list[tuple[float, int]] = []
        self._tares: list[TareRequest] = []
        self._captures: list[CaptureRequest] = []
        self._tare_lock = threading.Lock()
        self._lock = threading.Lock()
        self._pending_gap: dict[str, Any] | None = None
        self._last_end_ns: int | None = None
        self._commands: list[tuple[Callable[[Driver], Any], threading.Event, dict]] = []

    # -- commands from other threads -------------------------------------------------------
    def request_tare(self, channels: list[int], samples: int, origin: str) -> TareRequest:
        req = TareRequest(channels=channels, samples=max(1, samples), origin=origin)
        with self._tare_lock:
            self._tares.append(req)
        return req

    def capture(self, channel: int, samples: int, shunt_on: bool, timeout_s: float
                ) -> CaptureRequest:
        """Block the caller until `samples` usable values of `channel` (with SHUNT_ON set or
        clear as asked) have passed through the chain; return them (values and ratios)."""
        req = CaptureRequest(channel, max(1, samples), shunt_on)
        with self._tare_lock:
            self._captures.append(req)
        ok = req.done.wait(timeout_s)
        with self._tare_lock:
            if req in self._captures:
                self._captures.remove(req)
        if not ok:
            raise TimeoutError(f"device {self.name_}: no {'shunted' if shunt_on else 'unshunted'} "
                               f"samples of {self.chain.names[channel]} within {timeout_s:g} s")
        return req

    def call_driver(self, fn: Callable[[Driver], Any], timeout_s: float = 10.0) -> Any:
        """Run fn(driver) on the device thread (drivers are not thread-safe) and return its result."""
        done = threading.Event()
        box: dict[str, Any] = {}
        with self._lock:
            self._commands.append((fn, done, box))
        if not done.wait(timeout_s):
            raise TimeoutError(f"device {self.name_} did not run the command within {timeout_s} s")
        if "error" in box:
            raise box["error"]
        return box.get("result")

    def stop(self) -> None:
        self.stop_event.set()

    def note_gap(self, reason: str, since_ns: int | None) -> None:
        """Before start: this runner continues a device that stopped (restart, reload), so its
        first block is flagged AFTER_GAP and a gap event says why."""
        self._pending_gap = {"reason": reason, "since_ns": since_ns}

    # -- the loop ----------------------------------------------------------------------------
    def run(self) -> None:
        backoff = Backoff()
        options = self.device["options"]
        while not self.stop_event.is_set():
            drv = self.driver_cls(self.setup, options)
            self.driver = drv
            try:
                drv.open()
                self.state = "running"
                self.timebase.reanchor()
                self.last_block_mono = time.monotonic()
                self._pump(drv, backoff)
            except EndOfStream:
                self.state = "finished"
                self.emit(make_event("end_of_stream", self.name_, origin="driver"))
                self._close(drv)
                break
            except DriverError as exc:
                self.last_error = f"{type(exc).__name__}: {exc}"
                self.state = "reconnecting"
                self.reconnects += 1
                self._pending_gap = {"reason": str(exc), "since_ns": self._last_end_ns}
                self.emit(make_event("driver_fault", self.name_, origin="driver",
                                     error=str(exc), type=type(exc).__name__))
                log.warning("device %s: driver fault: %s; reopening", self.name_, exc)
            except Exception as exc:  # a driver bug: report, back off, retry
                self.last_error = f"{type(exc).__name__}: {exc}"
                self.state = "reconnecting"
                self.reconnects += 1
                self._pending_gap = {"reason": self.last_error, "since_ns": self._last_end_ns}
                self.emit(make_event("driver_fault", self.name_, origin="driver",
                                     error=self.last_error, type="unexpected"))
                log.exception("device %s: unexpected driver error", self.name_)
            self._close(drv)
            self._fail_commands("driver is reconnecting")
            if self._wait_beating(backoff.wait_s()):
                break
        self._close(self.driver)
        self._fail_commands("device stopped")
        if self.state != "finished":
            self.state = "stopped"

    def _wait_beating(self, seconds: float) -> bool:
        """Wait up to `seconds` for stop (True when asked to stop), beating the heartbeat at
        least twice a second meanwhile: a loop in its backoff is alive, not stuck."""
        end = time.monotonic() + seconds
        while True:
            if self.heartbeat is not None:
                self.heartbeat()
            left = end - time.monotonic()
            if left <= 0:
                return self.stop_event.is_set()
            if self.stop_event.wait(min(left, 0.5)):
                return True

    def _close(self, drv: Driver | None) -> None:
        if drv is None:
            return
        try:
            drv.close()
        except Exception:  # close must not mask the original fault
            log.exception("device %s: close failed", self.name_)

    def _fail_commands(self, why: str) -> None:
        with self._lock:
            cmds, self._commands = self._commands, []
        for _, done, box in cmds:
            box["error"] = DriverIOError(why)
            done.set()

    def _pump(self, drv: Driver, backoff: Backoff) -> None:
        stall_s = float(self.device.get("stall_timeout_s", 5.0))
        while not self.stop_event.is_set():
            self._run_commands(drv)
            block = drv.read_block(timeout_s=0.25)
            for dev_ev in drv.drain_events():
                self.emit(Event(dev_ev.wall_ns, dev_ev.kind, self.name_, "",
                                dict(dev_ev.detail), "driver"))
            if self.heartbeat is not None:
                self.heartbeat()
            if block is None:
                if time.monotonic() - self.last_block_mono > stall_s:
                    raise DriverIOError(f"no data for {stall_s:g} s (stalled)")
                continue
            backoff.reset()
            self.last_block_mono = time.monotonic()
            self._handle(block)

    def _run_commands(self, drv: Driver) -> None:
        if not self._commands:
            return
        with self._lock:
            cmds, self._commands = self._commands, []
        for fn, done, box in cmds:
            try:
                box["result"] = fn(drv)
            except Exception as exc:
                box["error"] = exc
            done.set()

    def _handle(self, block: Block) -> None:
        tb = self.timebase
        anchoring = tb.anchor_ns is None or block.start_index < tb.anchor_index
        block = tb.stamp(block)
        if anchoring and self.clock_synced is not None:
            self.anchor_unsynced = not self.clock_synced()
        if self.anchor_unsynced:
            block = block.with_quality(block.quality | np.uint8(Quality.CLOCK_UNSYNCED))
        if self._pending_gap is not None:
            gap = self._pending_gap
            self._pending_gap = None
            q = block.quality.copy()
            q[0, :] |= np.uint8(Quality.AFTER_GAP)
            block = block.with_quality(q)
            self.emit(make_event("gap", self.name_, origin="service", reason=gap["reason"],
                                 last_sample_before_ns=gap["since_ns"],
                                 first_sample_after_ns=block.t0_ns))
        eng = self.chain.convert(block)
        if self._tares:
            self._accumulate_tares(block)
        if self._captures:
            self._accumulate_captures(eng)
        for sink in self.sinks:
            sink.submit(eng)
        n = block.n_samples
        self.blocks += 1
        self.samples += n
        self.last_values = eng.values[-1].copy()
        self.last_time_ns = block.t0_ns + (n - 1) * block.period_ns
        self._last_end_ns = self.last_time_ns
        now = time.monotonic()
        self._rate_window.append((now, n))
        while self._rate_window and now - self._rate_window[0][0] > 10.0:
            self._rate_window.pop(0)

    def _accumulate_tares(self, block: Block) -> None:
        ratio = self.chain.ratio(block)
        usable = (block.quality & (UNUSABLE | Quality.SHUNT_ON)) == 0
        from straind.block import CODE_MAX, CODE_MIN
        if self.chain.native == "code24":
            usable &= (block.data != CODE_MAX) & (block.data != CODE_MIN)
        with self._tare_lock:
            reqs = list(self._tares)
        for req in reqs:
            cols = np.asarray(req.channels, dtype=np.intp)
            if req.sums is None:
                req.sums = np.zeros(len(cols))
                req.counts = np.zeros(len(cols), dtype=np.int64)
            u = usable[:, cols]
            req.sums += np.where(u, ratio[:, cols], 0.0).sum(axis=0)
            req.counts += u.sum(axis=0)
            if (req.counts >= req.samples).all():
                self._finish_tare(req)

    def _accumulate_captures(self, eng: EngineeringBlock) -> None:
        with self._tare_lock:
            reqs = list(self._captures)
        for req in reqs:
            q = eng.quality[:, req.channel]
            shunted = (q & np.uint8(Quality.SHUNT_ON)) != 0
            ok = ((q & np.uint8(UNUSABLE)) == 0) & (shunted == req.shunt_on)
            if ok.any():
                req.chunks.append(eng.values[ok, req.channel].copy())
                req.ratio_chunks.append(eng.raw.data[ok, req.channel].astype(np.float64)
                                        * self.chain.ratio_per_code[req.channel])
                req.count += int(ok.sum())
            if req.count >= req.samples:
                req.done.set()

    def _finish_tare(self, req: TareRequest) -> None:
        with self._tare_lock:
            self._tares.remove(req)
        assert req.sums is not None and req.counts is not None
        for k, ch in enumerate(req.channels):
            zero = float(req.sums[k] / req.counts[k])
            if self.on_zero is not None:
                req.result[self.chain.names[ch]] = self.on_zero(self, ch, zero, int(req.counts[k]),
                                                                req.origin)
            else:
                self.chain.set_zero(ch, zero)
        req.done.set()

    def cancel_tares(self, why: str) -> None:
        with self._tare_lock:
            reqs, self._tares = self._tares, []
        for r in reqs:
            r.error = why
            r.done.set()

    # -- status ------------------------------------------------------------------------------
    def rate_hz(self) -> float:
        w = list(self._rate_window)
        if len(w) < 2:
            return 0.0
        span = w[-1][0] - w[0][0]
        return sum(n for _, n in w[1:]) / span if span > 0 else 0.0

    def status(self) -> dict[str, Any]:
        drv = self.driver
        values = None if self.last_values is None else {
            name: (None if not np.isfinite(v) else float(v))
            for name, v in zip(self.chain.names, self.last_values)}
        return {
            "state": self.state, "driver": self.device["driver"],
            "sample_rate_hz": float(self.device["sample_rate_hz"]),
            "measured_rate_hz": round(self.rate_hz(), 3), "blocks": self.blocks,
            "samples": self.samples, "reconnects": self.reconnects, "last_error": self.last_error,
            "last_time_ns": self.last_time_ns, "last_values": values,
            "clock_unsynced_anchor": self.anchor_unsynced,
            "units": dict(zip(self.chain.names, self.chain.units)),
            "driver_counters": dict(drv.counters) if drv is not None else {},
        }
