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
import threading
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np

from straind import __version__
from straind.alarmsink import AlarmSink, rules_from_config
from straind.chain import DeviceChain
from straind.config import Config, config_warnings, redact_text
from straind.control import CommandError, ControlServer
from straind.events import Event, make_event
from straind.plugins import load_driver
from straind.state import StateStore
from straind.store import Store, recover_unclosed
from straind.supervisor import DeviceRunner
from straind.upkeep import Upkeep

__all__ = ["Service", "run_service"]

log = logging.getLogger("straind")

#: How long a tare averages by default (s)
TARE_SECONDS = 1.0
#: A stop that takes longer than this is abandoned with exit status 1 (s); the environment
#: variable STRAIND_STOP_TIMEOUT_S overrides it (keep it below the unit's TimeoutStopSec)
STOP_TIMEOUT_S = 20.0


def stop_timeout_s() -> float:
    try:
        return max(1.0, float(os.environ.get("STRAIND_STOP_TIMEOUT_S", STOP_TIMEOUT_S)))
    except ValueError:
        return STOP_TIMEOUT_S


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
        self.alarms: AlarmSink | None = None
        self.sinks: list[Any] = []
        self._stopping = False
        #: clock, disk, faults, watchdog (see straind.upkeep)
        self.upkeep = Upkeep(self)

    # -- start ----------------------------------------------------------------------------------
    def start(self) -> None:
        cfg = self.config
        self.storage_dir.mkdir(parents=True, exist_ok=True)
        self.state = StateStore(self.state_path, cfg.station_id)
        unclean = self.state.unclean_previous_stop
        recovered = recover_unclosed(self.storage_dir)

        chains: list[tuple[dict, type, DeviceChain]] = []
        for dev in cfg.devices:
            cls, chain = self._build_chain(dev)
            chains.append((dev, cls, chain))
        for warning in config_warnings(cfg.data):
            log.warning("configuration: %s", warning)
        layouts = [chain.device_layout(dev["driver"], self._zero_attrs(dev))
                   for dev, _, chain in chains]
        self.store = Store(cfg.storage | {"path": str(self.storage_dir)}, cfg.station_id,
                           redact_text(cfg.text), layouts, on_event=self._store_event)
        self.store.start()
        sinks: list[Any] = [self.store]
        self.sinks = sinks
        if cfg.data.get("alarms"):
            self.alarms = AlarmSink(rules_from_config(cfg.data["alarms"]), self.emit)
            sinks.append(self.alarms)
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
            self.runners.append(self._make_runner(dev, cls, chain))
        self.state.mark_running(True)
        for runner in self.runners:
            self.upkeep.beats.arm(runner.name_)
            runner.start()
        self._tare_at_start()
        self.control = ControlServer(self.socket_path, self.handle_command, log)
        self.control.start()
        log.info("straind %s running: station %s, %d device(s), storage %s, control %s",
                 __version__, cfg.station_id, len(self.runners), self.storage_dir,
                 self.socket_path)

    def _build_chain(self, dev: dict) -> tuple[type, DeviceChain]:
        """The driver class and the conversion chain of one device, zeros from the state file."""
        assert self.state is not None
        cls = load_driver(dev["driver"])
        native = cls.static_info(dev["options"]).native
        chain = DeviceChain(dev, self.state.zeros(dev["name"]), native,
                            self.state.gains(dev["name"]))
        # T_zero of compensated gauges and creep references survive restarts too
        chain.restore(lambda ch, _d=dev["name"]: self.state.get(_d, ch))
        chain.on_note = lambda kind, ch, detail, persist, _d=dev["name"]: \
            self._chain_note(_d, kind, ch, detail, persist)
        return cls, chain

    def _make_runner(self, dev: dict, cls: type, chain: DeviceChain) -> DeviceRunner:
        """A (not yet started) runner whose heartbeat feeds the watchdog."""
        name = dev["name"]
        return DeviceRunner(dev, cls, chain, self.sinks, self.emit, on_zero=self._on_zero,
                            wall_clock_ns=self.wall_clock_ns,
                            heartbeat=lambda: self.upkeep.beats.beat(name),
                            clock_synced=self.upkeep.clock_synced)

    def reload(self) -> dict[str, Any]:
        """SIGHUP: re-read and apply the configuration file (see straind.reload)."""
        from straind.reload import reload_service
        return reload_service(self)

    def _make_feed(self, layouts: list) -> Any:
        mqtt = self.config.data.get("mqtt")
        if not mqtt or not mqtt.get("enabled", True):
            return None
        from straind.feed import Feed
        feed = Feed(mqtt, self.config.station_id, layouts, self.metadata(layouts),
                    state_dir=str(self.storage_dir),
                    on_event=lambda e: self.store.record_event(e) if self.store else None,
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

    def _refresh_metadata(self) -> None:
        """Republish the retained metadata after a zero or calibration change."""
        if self.feed is None:
            return
        layouts = [r.chain.device_layout(r.device["driver"], self._zero_attrs(r.device))
                   for r in self.runners]
        try:
            self.feed.set_metadata(self.metadata(layouts))
        except Exception:  # the feed must never break a tare
            log.exception("could not republish metadata")

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

    def _tare_at_start(self, runners: list[DeviceRunner] | None = None) -> None:
        assert self.state is not None
        for runner in self.runners if runners is None else runners:
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
        self.upkeep.count_event(event)
        if self.store is not None:
            self.store.record_event(event)
        if self.feed is not None:
            self.feed.record_event(event)
        where = "/".join(x for x in (event.device, event.channel) if x)
        # the kind is part of the template: the log's rate limit then holds back a noisy kind
        # without hiding the others (every event is still stored and counted)
        log.info(f"event {event.kind}%s %s", f" {where}" if where else "", event.detail_json())

    def _store_event(self, event: Event) -> None:
        """Events raised by the store itself (drops, faults): keep them and publish them."""
        self.recent_events.append(event)
        self.upkeep.count_event(event)
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
        # a thermally compensated gauge keeps the temperature at its tare (T_zero)
        t_zero = runner.chain.temperature_for(index)
        extra = {} if t_zero is None else {"temperature_at_zero_c": t_zero}
        st = self.state.update(runner.name_, ch, zero_ratio=zero, zero_taken_ns=now,
                               zero_samples=samples, zero_origin=origin, **extra)
        runner.chain.set_zero(index, zero)
        if t_zero is not None:
            runner.chain.set_temperature_zero(index, t_zero)
        detail = {"old_zero_ratio": None if np.isnan(old) else float(old),
                  "new_zero_ratio": zero, "samples": samples,
                  "calibration_version": st.calibration_version, **extra}
        self.emit(make_event("tare", runner.name_, ch, origin=origin, time_ns=now, **detail))
        self._refresh_metadata()
        return detail

    def _chain_note(self, device: str, kind: str, channel: str, detail: dict,
                    persist: dict) -> None:
        """A choice the chain made by itself (first-block temperature reference, creep
        reference): keep it in the state file, then record it as an event."""
        assert self.state is not None
        if persist:
            self.state.update(device, channel, **persist)
        self.emit(make_event(kind, device, channel, origin="service", **detail))

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
        if idx >= len(runner.device["channels"]):
            raise CommandError(f"{chan!r} is a derived column: it has no shunt resistor")
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
        expected = (float(pair[0] - pair[1]) * float(chain.gain_correction[idx])
                    * chain.step_factor(idx))  # GF(T) and transverse corrections scale steps
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
            self._refresh_metadata()
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
            # every bridge channel; temperature and derived columns have no zero of their own
            targets = {r: [i for i in range(len(r.chain.measured_names)) if r.chain.tareable[i]]
                       for r in self.runners}
            targets = {r: idx for r, idx in targets.items() if idx}
        else:
            chans = args.get("channels")
            if not isinstance(chans, list) or not chans:
                raise CommandError("tare needs 'channels' (a list of names) or 'all': true")
            targets = self._resolve_channels(chans)
            for r, idx in targets.items():
                for i in idx:
                    if i >= len(r.chain.measured_names):
                        raise CommandError(f"{r.name_}/{r.chain.names[i]} is a derived column: "
                                           "it follows the zero of its inputs; tare those")
                    if not r.chain.tareable[i]:
                        raise CommandError(f"{r.name_}/{r.chain.names[i]} is a temperature "
                                           "channel: tare does not apply to absolute readings")
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
        rate = sum(r.rate_hz() * len(r.chain.measured_names) for r in self.runners)
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
                "clock": ("unsynced" if not self.upkeep.clock.synced else
                          "steps_seen" if self.upkeep.clock.steps else "ok"),
                "faults": [f["kind"] for f in self.upkeep.faults()],
                "devices": {r.name_: r.state for r in self.runners}}

    def status(self) -> dict[str, Any]:
        assert self.state is not None
        devices = {}
        for r in self.runners:
            d = r.status()
            tares = {}
            for i, ch in enumerate(r.chain.measured_names):
                if not r.chain.tareable[i]:
                    continue  # temperature channels have no zero
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
            "alarms": self.alarms.active() if self.alarms is not None else [],
            **self.upkeep.status_fields(),
        }

    # -- stop -----------------------------------------------------------------------------------
    def stop(self, reason: str = "shutdown", timeout_s: float = STOP_TIMEOUT_S) -> bool:
        """Stop in order: control, devices, store (flush and close), feed (offline), state.
        Each part gets a share of timeout_s; False when one of them did not finish."""
        if self._stopping:
            return True
        self._stopping = True
        deadline = time.monotonic() + timeout_s
        ok = True
        log.info("stopping (%s)", reason)
        self.upkeep.notifier.stopping(f"stopping ({reason})")
        if self.control is not None:
            self.control.stop()
        for r in self.runners:
            r.stop()
        for r in self.runners:
            r.join(timeout=max(0.1, deadline - 0.6 * timeout_s - time.monotonic()))
            if r.is_alive():
                ok = False
                log.error("device %s did not stop (driver stuck); going on without it", r.name_)
        self.emit(make_event("stop", origin="service", reason=reason))
        if self.store is not None:   # data first: flush and close before the feed drains
            self.store.stop(timeout_s=max(1.0, deadline - 0.2 * timeout_s - time.monotonic()))
            if self.store.status()["running"]:
                ok = False
        if self.feed is not None:
            self.feed.stop(reason, timeout_s=max(0.5, min(5.0, deadline - time.monotonic() - 0.5)))
        if self.state is not None and ok:
            try:
                self.state.mark_running(False)   # else the next start reports an unclean stop
            except OSError as exc:
                ok = False
                log.error("cannot record the clean stop in %s: %s", self.state.path, exc)
        log.info("stopped" if ok else "stopped with parts still busy")
        return ok

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
    from straind.upkeep import install_test_clock_from_env
    svc = Service(config, wall_clock_ns=install_test_clock_from_env())
    try:
        svc.start()
    except Exception:
        svc.stop("start failed")
        raise
    svc.upkeep.notifier.ready(svc.upkeep.summary())
    deadline = None if duration_s is None else time.monotonic() + duration_s
    reason = "duration reached"
    stopped_ok = True
    try:
        while True:
            timeout = svc.upkeep.timeout_s()
            if deadline is not None:
                timeout = max(0.0, min(timeout, deadline - time.monotonic()))
            ready, _, _ = select.select([rfd], [], [], timeout)
            if ready:
                os.read(rfd, 64)
            stop_now = False
            while pending:
                signum = pending.popleft()
                if signum in (signal.SIGTERM, signal.SIGINT):
                    reason = signal.Signals(signum).name
                    stop_now = True
                elif signum == signal.SIGHUP and not stop_now:
                    log.info("SIGHUP: reloading %s", svc.config.source)
                    svc.reload()
            if stop_now:
                break
            try:
                svc.upkeep.tick()
            except Exception:  # noqa: BLE001 - a bug in a check must not end acquisition
                log.exception("upkeep check failed")
            if deadline is not None and time.monotonic() >= deadline:
                break
            if svc.all_finished():
                reason = "all sources finished"
                break
    finally:
        limit_s = stop_timeout_s()
        guard = threading.Timer(limit_s + 2.0, _stop_overrun, args=(reason, limit_s))
        guard.daemon = True
        guard.start()
        stopped_ok = svc.stop(reason, timeout_s=limit_s)
        guard.cancel()
        for s, h in old.items():
            signal.signal(s, h)
        os.close(rfd)
        os.close(wfd)
    busy = [t.name for t in threading.enumerate()
            if t is not threading.main_thread() and not t.daemon and t.is_alive()]
    if busy:
        # a stuck driver thread would keep the interpreter from exiting: do not hang
        log.error("threads still busy after stop (%s); exiting with status 1", ", ".join(busy))
        _exit_now(1)
    if svc.store is not None and svc.store.status().get("unclosable_segments"):
        # HDF5 could not close a file (storage failed under it): leave without tearing the
        # library down, which would touch that file again; the next start recovers it
        log.error("a segment could not be closed; it is recovered at the next start")
        _exit_now(1)
    return 0 if stopped_ok else 1


def _exit_now(status: int) -> None:
    for h in logging.getLogger("straind").handlers:
        try:
            h.flush()
        except Exception:  # noqa: BLE001
            pass
    os._exit(status)


def _stop_overrun(reason: str, limit_s: float) -> None:
    """The stop overran its time: say so and exit non-zero instead of hanging (the store
    flushes on its own timer, so at most about one flush interval is lost)."""
    log.critical("stopping (%s) took longer than %.0f s; exiting with status 1", reason, limit_s)
    _exit_now(1)
