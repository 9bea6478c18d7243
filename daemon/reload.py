"""Configuration reload (SIGHUP) and controlled device restarts.

A reload reads the configuration file again and validates it completely. An invalid file, or a
change the running service cannot apply, is refused: the message names the key, the running
configuration stays in force, and a `config_rejected` event is recorded. A valid file is
applied device by device:

* a device whose configuration did not change keeps its runner: no gap, same zero;
* a changed device is stopped and started again with its new configuration (a short gap,
  recorded as such); its channels keep their zeros and calibration from the state file,
  matched by name (the event lists the channels whose configuration changed, so a zero that
  no longer fits can be re-taken deliberately; it is never re-taken silently);
* added devices start, removed devices stop;
* when any device's layout (channels, units, rate, columns) differs, a new HDF5 segment starts
  after the last block of the old layout, with the new configuration text;
* `clock`, `storage.low_space_mb`, `storage.retention_days`, `storage.retention_max_gb` apply at
  once; a changed `mqtt` section (or layout) restarts the feed.

Keys that identify the station or the files (`station`, the other `storage` keys, `control`),
and sections this module does not know how to apply, need a restart of the service.
"""

from __future__ import annotations

import hashlib
import logging
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Mapping, Sequence

from straind.config import Config, load_config, redact_text
from straind.events import make_event
from straind.schema import ConfigError

if TYPE_CHECKING:  # pragma: no cover
    from straind.service import Service
    from straind.supervisor import DeviceRunner

__all__ = ["ReloadPlan", "plan_reload", "reload_service", "restart_devices", "diff_paths",
           "LIVE_STORAGE_KEYS"]

log = logging.getLogger("straind.reload")

#: storage keys a reload applies while running
LIVE_STORAGE_KEYS = frozenset({"low_space_mb", "retention_days", "retention_max_gb"})
#: top-level sections whose changes need a restart of the service
RESTART_ONLY = ("station", "storage", "control")
#: top-level sections a reload applies
APPLIED = ("devices", "clock", "mqtt")
#: how long a stopping device may take (s)
RUNNER_JOIN_S = 10.0


def diff_paths(a: Any, b: Any, prefix: str = "") -> list[str]:
    """Key paths (a.b[2].c) where two plain configuration trees differ."""
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        out: list[str] = []
        for k in sorted(set(a) | set(b), key=str):
            p = f"{prefix}.{k}" if prefix else str(k)
            if k not in a or k not in b:
                out.append(p)
            else:
                out.extend(diff_paths(a[k], b[k], p))
        return out
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        out = []
        for i, (x, y) in enumerate(zip(a, b)):
            out.extend(diff_paths(x, y, f"{prefix}[{i}]"))
        return out
    return [] if a == b else [prefix or "(top level)"]


@dataclass
class ReloadPlan:
    """What a reload changes (device names; key paths)."""

    unchanged: list[str] = field(default_factory=list)
    restart: list[str] = field(default_factory=list)
    added: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    changed_keys: list[str] = field(default_factory=list)
    feed_changed: bool = False

    @property
    def changes_devices(self) -> bool:
        return bool(self.restart or self.added or self.removed)


def plan_reload(old: Config, new: Config) -> ReloadPlan:
    """Compare two valid configurations; raise ConfigError for a change that needs a restart."""
    plan = ReloadPlan()
    for section in sorted(set(old.data) | set(new.data)):
        a, b = old.data.get(section), new.data.get(section)
        if a == b:
            continue
        paths = diff_paths(a, b, section)
        if section == "storage":
            paths_fixed = [p for p in paths if p.split(".")[1] not in LIVE_STORAGE_KEYS]
        elif section in APPLIED:
            paths_fixed = []
        else:
            paths_fixed = paths
        if paths_fixed:
            hint = ("cannot change while straind runs" if section in RESTART_ONLY
                    else "a reload does not apply changes to this section")
            raise ConfigError(paths_fixed[0], f"{hint}; restart the service to apply it "
                              "(the running configuration is kept)")
        plan.changed_keys.extend(paths)
        if section == "mqtt":
            plan.feed_changed = True
    old_devs = {d["name"]: d for d in old.devices}
    new_devs = {d["name"]: d for d in new.devices}
    for name, dev in new_devs.items():
        if name not in old_devs:
            plan.added.append(name)
        elif old_devs[name] == dev:
            plan.unchanged.append(name)
        else:
            plan.restart.append(name)
    plan.removed = [n for n in old_devs if n not in new_devs]
    # device keys by name, not by list position, for the event
    plan.changed_keys = [k for k in plan.changed_keys if not k.startswith("devices")]
    for name in plan.restart:
        plan.changed_keys.extend(f"devices[{name}]" + p[len("x"):]
                                 for p in diff_paths(old_devs[name], new_devs[name], "x"))
    plan.changed_keys.extend(f"devices[{n}]" for n in plan.added + plan.removed)
    return plan


def _layout_key(layout: Any) -> str:
    """A comparable text of a DeviceLayout (NaN attributes compare equal here)."""
    chans = [(c.name, c.column, c.quantity, c.unit, c.measured, sorted(c.attrs.items()))
             for c in layout.channels]
    return repr((layout.name, layout.driver, layout.sample_rate_hz, layout.raw_dtype,
                 layout.n_raw, sorted(layout.attrs.items()), chans))


def _channels_changed(old_dev: Mapping[str, Any], new_dev: Mapping[str, Any]) -> list[str]:
    old_ch = {c["name"]: c for c in old_dev["channels"]}
    return [c["name"] for c in new_dev["channels"]
            if c["name"] in old_ch and old_ch[c["name"]] != c]


def _stop_runners(svc: "Service", runners: Sequence["DeviceRunner"]) -> None:
    for r in runners:
        r.stop()
    for r in runners:
        r.join(timeout=RUNNER_JOIN_S)
        if r.is_alive():
            log.error("device %s did not stop within %.0f s (driver stuck); continuing without it",
                      r.name_, RUNNER_JOIN_S)
        svc.upkeep.beats.forget(r.name_)


def _apply(svc: "Service", new_cfg: Config, plan: ReloadPlan, reason: str,
           force_segment: bool = False, event_kind: str = "config_load") -> dict[str, Any]:
    """Build everything new first (any error leaves the service untouched), then switch."""
    assert svc.store is not None
    new_devs = {d["name"]: d for d in new_cfg.devices}
    old_by_name = {r.name_: r for r in svc.runners}
    built = {name: svc._build_chain(new_devs[name]) for name in plan.restart + plan.added}

    def layout(dev: dict, chain: Any) -> Any:
        return chain.device_layout(dev["driver"], svc._zero_attrs(dev))

    new_layouts = [layout(d, built[d["name"]][1] if d["name"] in built
                          else old_by_name[d["name"]].chain) for d in new_cfg.devices]
    old_layouts = [layout(r.device, r.chain) for r in svc.runners]
    new_segment = force_segment or (sorted(map(_layout_key, new_layouts))
                                    != sorted(map(_layout_key, old_layouts)))
    feed_restart = plan.feed_changed or (new_segment and svc.feed is not None)

    _stop_runners(svc, [old_by_name[n] for n in plan.restart + plan.removed])
    text = redact_text(new_cfg.text)
    if new_segment:
        svc.store.new_segment(new_layouts, text)
    svc.config = new_cfg
    if feed_restart:
        _restart_feed(svc, new_layouts, reason)
    fresh = {name: svc._make_runner(new_devs[name], cls, chain)
             for name, (cls, chain) in built.items()}
    for name in plan.restart:
        fresh[name].note_gap(f"device restarted ({reason})", old_by_name[name].last_time_ns)
        if not force_segment:  # the same segment goes on: its times must keep increasing
            fresh[name].timebase.floor_ns = old_by_name[name].timebase.floor_ns
    svc.runners = [fresh.get(d["name"]) or old_by_name[d["name"]] for d in new_cfg.devices]
    for r in svc.runners:
        r.sinks = list(svc.sinks)
    svc.upkeep.configure(new_cfg)
    zeros_kept = {n: _channels_changed(old_by_name[n].device, new_devs[n]) for n in plan.restart}
    detail: dict[str, Any] = {
        "reason": reason, "source": new_cfg.source, "changed_keys": plan.changed_keys[:100],
        "devices_unchanged": plan.unchanged, "devices_restarted": plan.restart,
        "devices_added": plan.added, "devices_removed": plan.removed,
        "new_segment": new_segment, "feed_restarted": feed_restart,
        "zeros_kept_on_changed_channels": {k: v for k, v in zeros_kept.items() if v},
        "config_sha256": hashlib.sha256(text.encode()).hexdigest(),
    }
    if not new_segment and plan.changes_devices:
        detail["config_text"] = text   # the segment's /config is older: keep the new text here
    svc.emit(make_event(event_kind, origin=reason, **detail))
    for r in fresh.values():
        svc.upkeep.beats.arm(r.name_)
        r.start()
    svc._tare_at_start(list(fresh.values()))
    log.info("configuration applied (%s): restarted %s, added %s, removed %s, unchanged %s%s",
             reason, plan.restart or "-", plan.added or "-", plan.removed or "-",
             plan.unchanged or "-", "; new segment" if new_segment else "")
    return detail


def _restart_feed(svc: "Service", layouts: list, reason: str) -> None:
    old = svc.feed
    if old is not None:
        try:
            old.stop("reload")
        except Exception:  # noqa: BLE001 - a failing feed must not stop the reload
            log.exception("feed stop failed during reload")
    svc.feed = svc._make_feed(layouts)
    svc.sinks = [s for s in svc.sinks if s is not old]
    if svc.feed is not None:
        svc.sinks.append(svc.feed)


def reload_service(svc: "Service") -> dict[str, Any]:
    """SIGHUP: read, validate and apply the configuration file; refuse it with a clear message."""
    notifier = svc.upkeep.notifier
    notifier.reloading()
    source = svc.config.source
    try:
        new_cfg = load_config(source)
        plan = plan_reload(svc.config, new_cfg)
        if not plan.changed_keys and not plan.changes_devices:
            log.info("configuration reload: %s has not changed", source)
            svc.emit(make_event("config_load", origin="sighup", source=source, changed_keys=[],
                                note="unchanged"))
            return {"applied": True, "changed_keys": []}
        return {"applied": True, **_apply(svc, new_cfg, plan, "sighup")}
    except ConfigError as exc:
        log.error("configuration reload refused, the running configuration is kept: %s", exc)
        svc.emit(make_event("config_rejected", origin="sighup", source=source, error=str(exc),
                            key=exc.path, line=exc.line))
        return {"applied": False, "error": str(exc)}
    except Exception as exc:  # noqa: BLE001 - e.g. a driver that cannot be built
        log.exception("configuration reload failed, the running configuration is kept")
        svc.emit(make_event("config_rejected", origin="sighup", source=source,
                            error=f"{type(exc).__name__}: {exc}", key=None, line=None))
        return {"applied": False, "error": str(exc)}
    finally:
        notifier.ready(svc.upkeep.summary())


def restart_devices(svc: "Service", names: Sequence[str], reason: str) -> dict[str, Any]:
    """Restart some devices with their present configuration, in a new segment (e.g. after the
    clock became synchronised, so their times are anchored again)."""
    plan = ReloadPlan(unchanged=[r.name_ for r in svc.runners if r.name_ not in names],
                      restart=[r.name_ for r in svc.runners if r.name_ in names])
    log.info("restarting device(s) %s (%s)", ", ".join(plan.restart), reason)
    return _apply(svc, svc.config, plan, reason, force_segment=True,
                  event_kind="devices_restarted")
