"""The service: builds drivers, chains and sinks from a configuration, runs them, and answers
commands. Signal handlers only queue the signal; the main loop dispatches it.
"""

from __future__ import annotations

import collections
import logging
import os
import select
import signal
import socket
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

from straind import __version__
from straind.chain import DeviceChain
from straind.config import Config, redact_text
from straind.control import CommandError, ControlServer
from straind.events import Event, make_event
from straind.plugins import load_driver
from straind.state import StateStore
from straind.store import Store, recover_unclosed
from straind.supervisor import DeviceRunner

__all__ = ["Service", "run_service"]

log = logging.getLogger("straind")

#: How long a tare averages by default (s)
TARE_SECONDS = 1.0


class Service:
    """One running straind: devices, chain, store, optional feed, control socket."""

    def __init__(self, config: Config, wall_clock_ns: Callable[[], int] = time.time_ns):
        self.config = config
        self.wall_clock_ns = wall_clock_ns
        self.started_mono = time.monotonic()
        self.started_ns = wall_clock_ns()
        st = config.storage
        self.storage_dir = config.resolve(st["path"])
        self.state_path = config.resolve(st["state_file"]) if st["state_file"] else \
            self.storage_dir / "straind-state.json"
        sock = config.data["control"]["socket"]
        self.socket_path = config.resolve(sock) if sock else self.storage_dir / "straind.sock"
        self.recent_events: collections.deque[Event] = collections.deque(maxlen=50)
        self.runners: list[DeviceRunner] = []
        self.store: Store | None = None
        self.feed: Any = None
        self.control: ControlServer | None = None
        self.state: StateStore | None = None
        self._stopping = False

    # -- start ----------------------------------------------------------------------------------
    def start(self) -> None:
        cfg = self.config
        self.storage_dir.mkdir(parents=True, exist_ok=True)
        self.state = StateStore(self.state_path, cfg.station_id)
        unclean = self.state.unclean_previous_stop
        recovered = recover_unclosed(self.storage_dir)

        chains: list[tuple[dict, type, DeviceChain]] = []
        for dev in cfg.devices:
            cls = load_driver(dev["driver"])
            native = cls.static_info(dev["options"]).native
            chain = DeviceChain(dev, self.state.zeros(dev["name"]), native,
                                self.state.gains(dev["name"]))
            chains.append((dev, cls, chain))
        layouts = [chain.device_layout(dev["driver"], self._zero_attrs(dev))
                   for dev, _, chain in chains]
        self.store = Store(cfg.storage | {"path": str(self.storage_dir)}, cfg.station_id,
                           redact_text(cfg.text), layouts, on_event=self._store_event)
        self.store.start()
        sinks: list[Any] = [self.store]
        self.feed = self._make_feed(layouts)
        if self.feed is not None:
            sinks.append(self.feed)
        if unclean or recovered:
            self.emit(make_event("unclean_stop", origin="startup",
                                 recovered_files=[p.name for p in recovered],
                                 state_said_running=unclean))
        self.emit(make_event("config_load", origin="startup", source=cfg.source,
                             version=__version__, devices=[d["name"] for d in cfg.devices]))
        for dev, cls, chain in chains:
            runner = DeviceRunner(dev, cls, chain, sinks, self.emit, on_zero=self._on_zero,
                                  wall_clock_ns=self.wall_clock_ns)
            self.runners.append(runner)
        self.state.mark_running(True)
        for runner in self.runners:
            runner.start()
        self._tare_at_start()
        self.control = ControlServer(self.socket_path, self.handle_command, log)
        self.control.start()
        log.info("straind %s running: station %s, %d device(s), storage %s, control %s",
                 __version__, cfg.station_id, len(self.runners), self.storage_dir,
                 self.socket_path)

    def _make_feed(self, layouts: list) -> Any:
        mqtt = self.config.data.get("mqtt")
        if not mqtt or not mqtt.get("enabled", True):
            return None
        from straind.feed import Feed
        feed = Feed(mqtt, self.config.station_id, layouts, self.metadata(layouts),
                    status_provider=self.health, on_command=self.handle_command,
                    config_path=self.config.source, log=logging.getLogger("straind.feed"))
        feed.start()
        return feed

    def metadata(self, layouts: list) -> dict[str, Any]:
        """What a subscriber needs to configure itself: devices, channels, units, calibration."""
        return {
            "station": self.config.station_id,
            "description": self.config.data["station"]["description"],
            "straind_version": __version__,
            "devices": [{
                "name": lay.name, "driver": lay.driver, "sample_rate_hz": lay.sample_rate_hz,
                "channels": [{"name": c.name, "column": c.column, "quantity": c.quantity,
                              "unit": c.unit, "measured": c.measured, **dict(c.attrs)}
                             for c in lay.channels]} for lay in layouts],
        }

    def _zero_attrs(self, dev: dict) -> dict[str, dict]:
        assert self.state is not None
        out = {}
        for ch in dev["channels"]:
            st = self.state.get(dev["name"], ch["name"])
            out[ch["name"]] = {"zero_taken_ns": int(st.zero_taken_ns or 0),
                               "zero_origin": st.zero_origin,
                               "calibration_version": int(st.calibration_version),
                               "gain_correction": float(st.gain_correction)}
        return out

    def _tare_at_start(self) -> None:
        assert self.state is not None
        for runner in self.runners:
            idx = [i for i, ch in enumerate(runner.device["channels"])
                   if ch["tare"]["at_start"] and
                   self.state.get(runner.name_, ch["name"]).zero_ratio is None]
            if idx:
                n = max(1, int(round(runner.device["sample_rate_hz"] * TARE_SECONDS)))
                runner.request_tare(idx, n, "at_start")

    # -- events ---------------------------------------------------------------------------------
    def emit(self, event: Event) -> None:
        """Record an event in every sink and the log."""
        self.recent_events.append(event)
        if self.store is not None:
            self.store.record_event(event)
        if self.feed is not None:
            self.feed.record_event(event)
        where = "/".join(x for x in (event.device, event.channel) if x)
        log.info("event %s%s %s", event.kind, f" {where}" if where else "", event.detail_json())

    def _store_event(self, event: Event) -> None:
        """Events raised by the store itself (drops, faults): keep them and publish them."""
        self.recent_events.append(event)
        if self.feed is not None:
            self.feed.record_event(event)
        log.warning("storage: %s %s", event.kind, event.detail_json())

    def _on_zero(self, runner: DeviceRunner, index: int, zero: float, samples: int,
                 origin: str) -> dict:
        """A tare finished on the device thread: persist first, then apply, then record."""
        assert self.state is not None
        ch = runner.chain.names[index]
        old = runner.chain.zero_ratio[index]
        now = self.wall_clock_ns()
        st = self.state.update(runner.name_, ch, zero_ratio=zero, zero_taken_ns=now,
                               zero_samples=samples, zero_origin=origin)
        runner.chain.set_zero(index, zero)
        detail = {"old_zero_ratio": None if np.isnan(old) else float(old),
                  "new_zero_ratio": zero, "samples": samples,
                  "calibration_version": st.calibration_version}
        self.emit(make_event("tare", runner.name_, ch, origin=origin, time_ns=now, **detail))
        return detail

    # -- commands -------------------------------------------------------------------------------
    def _resolve_channels(self, names: list[str]) -> dict[DeviceRunner, list[int]]:
        out: dict[DeviceRunner, list[int]] = {}
        for name in names:
            if not isinstance(name, str):
                raise CommandError(f"channel names must be text, got {name!r}")
            dev_name, _, ch_name = name.rpartition("/")
            hits = []
            for r in self.runners:
                if dev_name and r.name_ != dev_name:
                    continue
                if ch_name in r.chain.names:
                    hits.append((r, r.chain.names.index(ch_name)))
            if not hits:
                raise CommandError(f"no channel {name!r} (use CHANNEL or DEVICE/CHANNEL)")
            if len(hits) > 1:
                raise CommandError(f"channel name {name!r} is ambiguous; use DEVICE/CHANNEL")
            r, i = hits[0]
            out.setdefault(r, [])
            if i not in out[r]:
                out[r].append(i)
        return out

    def handle_command(self, name: str, args: dict, origin: str) -> Any:
        """The one dispatcher for the control socket and remote (MQTT) commands."""
        if name == "status":
            return self.status()
        if name in ("tare", "mark", "shunt-cal"):
            self.emit(make_event("command", origin=origin, command=name,
                                 args={k: v for k, v in args.items()}))
        if name == "tare":
            return self._cmd_tare(args, origin)
        if name == "mark":
            text = args.get("text", "")
            if not isinstance(text, str) or not text:
                raise CommandError("mark needs a non-empty 'text'")
            self.emit(make_event("mark", origin=origin, text=text[:1000]))
            return {"marked": text[:1000]}
        if name == "shunt-cal":
            return self._cmd_shunt_cal(args, origin)
        raise CommandError(f"unknown command {name!r}")

    def _cmd_shunt_cal(self, args: dict, origin: str) -> dict:
        """Switch the shunt in, measure the step, compare with the exact bridge equation.

        The step is mean(shunt on) - mean(shunt off) over `seconds` each. The expected step is
        what the chain would report for the shunted arm, from the exact forward model at the
        bridge's present state (found from the unshunted ratio), so a shunt calibration under
        load is exact too; at zero strain it is -Rg / (GF (Rg + Rs)) for arm 1 of a quarter
        bridge. The gain error is recorded; it is applied only when `apply` is true.
        """
        from straind import bridge
        assert self.state is not None
        chan = args.get("channel")
        if not isinstance(chan, str):
            raise CommandError("shunt-cal needs 'channel' (CHANNEL or DEVICE/CHANNEL)")
        (runner, idx), = [(r, i[0]) for r, i in self._resolve_channels([chan]).items()]
        ch = runner.device["channels"][idx]
        if ch["sensor"] != "strain_gauge" or not ch.get("shunt"):
            raise CommandError(f"channel {chan!r} has no shunt resistor configured (shunt.ohm)")
        if runner.state != "running":
            raise CommandError(f"device {runner.name_} is {runner.state}")
        seconds = args.get("seconds", TARE_SECONDS)
        if isinstance(seconds, bool) or not isinstance(seconds, (int, float)) or not 0 < seconds <= 60:
            raise CommandError("'seconds' must be a number of seconds in (0, 60]")
        apply = bool(args.get("apply", False))
        sh = ch["shunt"]
        circuit = bridge.circuit_for(ch["bridge"], gauge_ohm=ch["gauge_ohm"],
                                     completion_ohm=ch["completion_ohm"], lead_ohm=ch["lead_ohm"],
                                     wiring=ch["wiring"], poisson=ch["poisson"], arms=ch["arms"])
        n = max(1, int(round(runner.device["sample_rate_hz"] * seconds)))
        wait = seconds * 4 + 10
        try:
            off = runner.capture(idx, n, False, wait)
            runner.call_driver(lambda d: d.set_shunt(idx, True))
            try:
                on = runner.capture(idx, n, True, wait)
            finally:
                runner.call_driver(lambda d: d.set_shunt(idx, False))
        except TimeoutError as exc:
            raise CommandError(str(exc)) from None
        except Exception as exc:  # NotSupported, DriverIOError
            raise CommandError(f"shunt calibration of {chan} failed: {exc}") from None
        # the expected step, from the exact bridge model at the state the bridge is in now
        chain = runner.chain
        v_off = float(np.mean(off.ratios()))
        x_off, _ = bridge.BridgeInverse(circuit).x_from_ratio(np.array([v_off]))
        v_on = bridge.shunted_ratio_at(circuit, float(x_off[0]), sh["ohm"], sh["arm"],
                                       include_lead=not sh["at_gauge"])
        conv = chain.converters[idx]
        o = float(chain.offsets()[idx])
        pair, _ = conv.convert_ratio(np.array([v_on - o, v_off - o]))
        expected = float(pair[0] - pair[1]) * float(chain.gain_correction[idx])
        measured = float(np.mean(on.values()) - np.mean(off.values()))
        gain = measured / expected
        error_pct = (gain - 1.0) * 100.0
        within = abs(error_pct) <= sh["tolerance_pct"]
        old_gc = float(runner.chain.gain_correction[idx])
        new_gc = old_gc / gain if apply else old_gc
        now = self.wall_clock_ns()
        changes: dict[str, Any] = {"shunt_gain": gain, "shunt_taken_ns": now}
        if apply:
            changes["gain_correction"] = new_gc
        st = self.state.update(runner.name_, ch["name"], **changes)
        if apply:
            runner.chain.set_gain_correction(idx, new_gc)
        detail = {"shunt_ohm": sh["ohm"], "arm": sh["arm"], "expected_microstrain": expected,
                  "measured_microstrain": measured, "gain": gain, "gain_error_pct": error_pct,
                  "tolerance_pct": sh["tolerance_pct"], "within_tolerance": within,
                  "applied": apply, "gain_correction": new_gc, "samples": n,
                  "calibration_version": st.calibration_version}
        self.emit(make_event("shunt_cal", runner.name_, ch["name"], origin=origin, time_ns=now,
                             **detail))
        if not within:
            self.emit(make_event("shunt_cal_out_of_tolerance", runner.name_, ch["name"],
                                 origin=origin, gain_error_pct=error_pct,
                                 tolerance_pct=sh["tolerance_pct"]))
        return {f"{runner.name_}/{ch['name']}": detail}

    def _cmd_tare(self, args: dict, origin: str) -> dict:
        if args.get("all"):
            targets = {r: list(range(len(r.chain.names))) for r in self.runners}
        else:
            chans = args.get("channels")
            if not isinstance(chans, list) or not chans:
                raise CommandError("tare needs 'channels' (a list of names) or 'all': true")
            targets = self._resolve_channels(chans)
        seconds = args.get("seconds", TARE_SECONDS)
        if isinstance(seconds, bool) or not isinstance(seconds, (int, float)) or not 0 < seconds <= 600:
            raise CommandError("'seconds' must be a number of seconds in (0, 600]")
        reqs = []
        for r, idx in targets.items():
            if r.state != "running":
                raise CommandError(f"device {r.name_} is {r.state}; a zero needs live data")
            n = max(1, int(round(r.device["sample_rate_hz"] * seconds)))
            reqs.append((r, r.request_tare(idx, n, origin)))
        result: dict[str, Any] = {}
        deadline = time.monotonic() + seconds * 3 + 10
        for r, req in reqs:
            if not req.done.wait(max(0.0, deadline - time.monotonic())):
                r.cancel_tares("timed out")
                raise CommandError(f"tare on device {r.name_} timed out (no usable samples)")
            if req.error:
                raise CommandError(f"tare on device {r.name_} failed: {req.error}")
            for ch, detail in req.result.items():
                result[f"{r.name_}/{ch}"] = detail
        return result

    # -- status ---------------------------------------------------------------------------------
    def health(self) -> dict[str, Any]:
        """Short health figures (also for the feed's status topic)."""
        rate = sum(r.rate_hz() * len(r.chain.names) for r in self.runners)
        store = self.store.status() if self.store else {}
        try:
            st = os.statvfs(self.storage_dir)
            free = st.f_bavail * st.f_frsize
        except OSError:
            free = None
        return {"channel_samples_per_s": round(rate, 1),
                "store_dropped_blocks": store.get("dropped_blocks", 0),
                "store_queue_blocks": store.get("queue_blocks", 0),
                "disk_free_bytes": free,
                "clock": "steps_seen" if any(r.timebase.steps for r in self.runners) else "ok",
                "devices": {r.name_: r.state for r in self.runners}}

    def status(self) -> dict[str, Any]:
        assert self.state is not None
        devices = {}
        for r in self.runners:
            d = r.status()
            tares = {}
            for ch in r.chain.names:
                st = self.state.get(r.name_, ch)
                tares[ch] = {"zero_ratio": st.zero_ratio, "taken_ns": st.zero_taken_ns,
                             "origin": st.zero_origin, "calibration_version": st.calibration_version}
            d["zeros"] = tares
            devices[r.name_] = d
        return {
            "station": self.config.station_id, "version": __version__, "pid": os.getpid(),
            "host": socket.gethostname(), "config": self.config.source,
            "uptime_s": round(time.monotonic() - self.started_mono, 1),
            "devices": devices, "storage": self.store.status() if self.store else {},
            "feed": self.feed.status() if self.feed is not None else None,
            "health": self.health(),
            "recent_events": [e.as_dict() for e in list(self.recent_events)[-10:]],
        }

    # -- stop -----------------------------------------------------------------------------------
    def stop(self, reason: str = "shutdown") -> None:
        if self._stopping:
            return
        self._stopping = True
        log.info("stopping (%s)", reason)
        if self.control is not None:
            self.control.stop()
        for r in self.runners:
            r.stop()
        for r in self.runners:
            r.join(timeout=10)
        self.emit(make_event("stop", origin="service", reason=reason))
        if self.feed is not None:
            self.feed.stop(reason)
        if self.store is not None:
            self.store.stop()
        if self.state is not None:
            self.state.mark_running(False)
        log.info("stopped")

    def all_finished(self) -> bool:
        return bool(self.runners) and all(r.state == "finished" for r in self.runners)


def run_service(config: Config, duration_s: float | None = None) -> int:
    """Run until SIGTERM/SIGINT (or `duration_s`); return the exit status."""
    pending: collections.deque[int] = collections.deque()
    rfd, wfd = os.pipe()
    os.set_blocking(wfd, False)

    def on_signal(signum: int, _frame: Any) -> None:
        pending.append(signum)  # only queue it; the loop below acts
        try:
            os.write(wfd, b"s")
        except OSError:
            pass

    old = {s: signal.signal(s, on_signal) for s in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP)}
    svc = Service(config)
    try:
        svc.start()
    except Exception:
        svc.stop("start failed")
        raise
    deadline = None if duration_s is None else time.monotonic() + duration_s
    reason = "duration reached"
    try:
        while True:
            timeout = 0.5 if deadline is None else max(0.0, min(0.5, deadline - time.monotonic()))
            ready, _, _ = select.select([rfd], [], [], timeout)
            if ready:
                os.read(rfd, 64)
            stop_now = False
            while pending:
                signum = pending.popleft()
                if signum in (signal.SIGTERM, signal.SIGINT):
                    reason = signal.Signals(signum).name
                    stop_now = True
                elif signum == signal.SIGHUP:
                    log.warning("SIGHUP: configuration reload is not supported yet; ignoring")
            if stop_now:
                break
            if deadline is not None and time.monotonic() >= deadline:
                break
            if svc.all_finished():
                reason = "all sources finished"
                break
    finally:
        svc.stop(reason)
        for s, h in old.items():
            signal.signal(s, h)
        os.close(rfd)
        os.close(wfd)
    return 0
