"""Keeping a long-running service healthy: clock steps and synchronisation, disk space and
retention, the fault list shown by `straind status`, and the earned watchdog pings.

The main loop calls `Upkeep.tick()` a few times a second. Each check is cheap and bounded:

* **Clock steps.** The wall clock is compared with the monotonic clock (`Timebase.check_clock`);
  a jump of more than half a second either way is a `clock_step` event. Running sample times are
  never moved (they come from the sample clock); the store starts a new segment if a later
  re-anchor would take a device's times backwards.
* **Clock synchronisation.** The kernel's NTP state (adjtimex, read-only: `STA_UNSYNC` clear and
  not `TIME_ERROR` means synchronised; the same test `timedatectl` makes) is read every few
  seconds. Blocks anchored while the clock was not synchronised carry `Quality.CLOCK_UNSYNCED`;
  when the clock becomes synchronised the devices anchored before are restarted (a short,
  recorded gap) and a new segment begins, so no file mixes the two time scales
  (`clock.reanchor_on_sync`). `clock.sync_check: none` turns the check off.
* **Disk.** Free space below `storage.low_space_mb` raises `low_space` (cleared with 10 %
  hysteresis); optional retention deletes the oldest closed segments of this station beyond
  `storage.retention_days` or `storage.retention_max_gb`, never the open one, one event each.
* **Faults.** Storage faults (from the store), low space, an unsynchronised clock and devices
  that are reconnecting are listed with the time they began.

Test hooks (environment, read once at start): ``STRAIND_TEST_CLOCK_OFFSET_FILE`` names a file
holding an offset in ns that is added to the process's wall clock (time.time_ns / time.time),
to step the clock without root; ``STRAIND_TEST_CLOCK_SYNC_FILE`` names a file whose content
``1`` means synchronised (anything else, or no file, means not), replacing adjtimex.
"""

from __future__ import annotations

import collections
import ctypes
import ctypes.util
import logging
import os
import re
import threading
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Mapping

from straind.events import Event, make_event
from straind.notify import Heartbeats, Notifier
from straind.timebase import Timebase

if TYPE_CHECKING:  # pragma: no cover
    from straind.service import Service

__all__ = ["Upkeep", "ClockWatch", "DiskWatch", "adjtimex_synced", "sync_source",
           "install_test_clock_from_env", "OffsetClock", "segment_files"]

log = logging.getLogger("straind.upkeep")

#: How often the clock synchronisation state is read (s).
SYNC_CHECK_S = 1.0
#: How often free space is looked at (s).
DISK_CHECK_S = 2.0
#: Retention runs at start, at every new segment, and at least this often (s).
RETENTION_CHECK_S = 60.0
#: Without a watchdog, a loop silent this long is shown as stuck (s).
STUCK_WITHOUT_WATCHDOG_S = 10.0
#: low_space clears once free space is this factor above the threshold.
LOW_SPACE_HYSTERESIS = 1.1

_STA_UNSYNC = 0x0040
_TIME_ERROR = 5


# ----------------------------------------------------------------------------- clock sources

class _Timeval(ctypes.Structure):
    _fields_ = [("tv_sec", ctypes.c_long), ("tv_usec", ctypes.c_long)]


class _Timex(ctypes.Structure):
    """Linux `struct timex` (adjtimex(2)); natural alignment matches the kernel's layout."""

    _fields_ = [("modes", ctypes.c_uint), ("offset", ctypes.c_long), ("freq", ctypes.c_long),
                ("maxerror", ctypes.c_long), ("esterror", ctypes.c_long),
                ("status", ctypes.c_int), ("constant", ctypes.c_long),
                ("precision", ctypes.c_long), ("tolerance", ctypes.c_long),
                ("time", _Timeval), ("tick", ctypes.c_long), ("ppsfreq", ctypes.c_long),
                ("jitter", ctypes.c_long), ("shift", ctypes.c_int), ("stabil", ctypes.c_long),
                ("jitcnt", ctypes.c_long), ("calcnt", ctypes.c_long), ("errcnt", ctypes.c_long),
                ("stbcnt", ctypes.c_long), ("tai", ctypes.c_int), ("_pad", ctypes.c_int * 11)]


_libc: Any = None


def adjtimex_synced() -> bool | None:
    """True when the kernel says the clock is synchronised, False when not, None if unknown.

    modes = 0 only reads the state (no privilege needed). Unsynchronised: the call returns
    TIME_ERROR or status has STA_UNSYNC (set at boot, cleared by an NTP client that synced).
    """
    global _libc
    try:
        if _libc is None:
            _libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        tx = _Timex()
        state = _libc.adjtimex(ctypes.byref(tx))
    except (OSError, AttributeError):
        return None
    if state < 0:
        return None
    return not (state == _TIME_ERROR or tx.status & _STA_UNSYNC)


def _file_synced(path: str) -> bool:
    try:
        return Path(path).read_text().strip() == "1"
    except OSError:
        return False


def sync_source(mode: str, env: Mapping[str, str] | None = None) -> Callable[[], bool]:
    """The clock synchronisation test for `clock.sync_check` (adjtimex | none)."""
    env = os.environ if env is None else env
    if mode == "none":
        return lambda: True
    path = env.get("STRAIND_TEST_CLOCK_SYNC_FILE")
    if path:
        return lambda: _file_synced(path)
    # unknown (no adjtimex): treat as not synchronised, which only adds a flag
    return lambda: adjtimex_synced() is True


class OffsetClock:
    """The real wall clock plus an offset (ns) read from a file, re-read at most every 50 ms."""

    def __init__(self, path: str, real_ns: Callable[[], int] = time.time_ns):
        self.path = path
        self.real_ns = real_ns
        self._offset = 0
        self._next = 0.0
        self._lock = threading.Lock()

    def offset_ns(self) -> int:
        now = time.monotonic()
        if now >= self._next:
            with self._lock:
                try:
                    self._offset = int(Path(self.path).read_text().strip() or 0)
                except (OSError, ValueError):
                    pass
                self._next = now + 0.05
        return self._offset

    def time_ns(self) -> int:
        return self.real_ns() + self.offset_ns()

    def time(self) -> float:
        return self.time_ns() / 1e9


def install_test_clock_from_env(env: Mapping[str, str] | None = None) -> Callable[[], int]:
    """The wall clock for the service: time.time_ns, or (test hook) an offset clock that also
    replaces time.time_ns and time.time for everything in the process (drivers, events, logs)."""
    env = os.environ if env is None else env
    path = env.get("STRAIND_TEST_CLOCK_OFFSET_FILE")
    if not path:
        return time.time_ns
    clock = OffsetClock(path, time.time_ns)
    time.time_ns = clock.time_ns   # type: ignore[assignment]
    time.time = clock.time         # type: ignore[assignment]
    log.warning("test hook: wall clock offset from %s", path)
    return clock.time_ns


class ClockWatch:
    """Watches for wall-clock steps and for the clock's synchronisation state."""

    def __init__(self, wall_clock_ns: Callable[[], int], synced: Callable[[], bool],
                 mono_clock_ns: Callable[[], int] = time.monotonic_ns):
        self._tb = Timebase(1, wall_clock_ns, mono_clock_ns)
        self._synced_fn = synced
        self.synced = bool(synced())
        self.unsynced_since_ns: int | None = None if self.synced else wall_clock_ns()
        self.wall_clock_ns = wall_clock_ns
        self.steps = 0
        self.last_step: dict[str, Any] | None = None
        self._next_sync = time.monotonic() + SYNC_CHECK_S
        self._tb.check_clock()

    def check(self, force_sync: bool = False) -> tuple[list[Event], bool | None]:
        """Events for a step; and the new sync state when it changed (else None)."""
        events: list[Event] = []
        step = self._tb.check_clock()
        if step is not None:
            self.steps += 1
            self.last_step = {"step_ns": step.step_ns, "step_s": round(step.step_ns / 1e9, 6),
                              "wall_ns": step.wall_ns}
            events.append(make_event("clock_step", origin="service", time_ns=step.wall_ns,
                                     step_ns=step.step_ns, step_s=round(step.step_ns / 1e9, 6),
                                     direction="forward" if step.step_ns > 0 else "back",
                                     note="sample times are not moved: they follow the sample "
                                          "clock"))
        changed = None
        now = time.monotonic()
        if force_sync or now >= self._next_sync:
            self._next_sync = now + SYNC_CHECK_S
            synced = bool(self._synced_fn())
            if synced != self.synced:
                self.synced = synced
                changed = synced
                self.unsynced_since_ns = None if synced else self.wall_clock_ns()
                events.append(make_event("clock_synced" if synced else "clock_unsynced",
                                         origin="service"))
        return events, changed


# ----------------------------------------------------------------------------- disk

def segment_files(directory: Path, station_id: str) -> list[Path]:
    """This station's segment files (`<station>_<YYYYmmddTHHMMSSZ>[-i].h5`) in the directory."""
    station = re.sub(r"[^A-Za-z0-9._-]", "_", station_id) or "station"
    pat = re.compile(re.escape(station) + r"_\d{8}T\d{6}Z(-\d+)?\.h5$")
    try:
        return [p for p in directory.iterdir() if pat.match(p.name) and p.is_file()]
    except OSError:
        return []


class DiskWatch:
    """Free space against `low_space_mb`, and retention of closed segments."""

    def __init__(self, directory: Path, station_id: str, storage: Mapping[str, Any]):
        self.directory = Path(directory)
        self.station_id = station_id
        self.configure(storage)
        self.free_bytes: int | None = None
        self.low = False
        self.low_since_ns: int | None = None
        self.deleted = 0
        self.deleted_bytes = 0

    def configure(self, storage: Mapping[str, Any]) -> None:
        self.low_space_bytes = int(float(storage.get("low_space_mb", 500) or 0) * 1e6)
        self.retention_days = float(storage.get("retention_days", 0) or 0)
        self.retention_max_bytes = int(float(storage.get("retention_max_gb", 0) or 0) * 1e9)

    def check_space(self) -> list[Event]:
        try:
            st = os.statvfs(self.directory)
        except OSError:
            return []
        free = st.f_bavail * st.f_frsize
        self.free_bytes = free
        if not self.low_space_bytes:
            if self.low:
                self.low = False
                self.low_since_ns = None
                return [make_event("low_space_cleared", free_mb=round(free / 1e6, 1),
                                   threshold_mb=0)]
            return []
        mb = round(free / 1e6, 1)
        thr = round(self.low_space_bytes / 1e6, 1)
        if not self.low and free < self.low_space_bytes:
            self.low = True
            self.low_since_ns = time.time_ns()
            log.warning("low disk space on %s: %.1f MB free (threshold %.1f MB)",
                        self.directory, mb, thr)
            return [make_event("low_space", free_mb=mb, threshold_mb=thr,
                               path=str(self.directory))]
        if self.low and free > self.low_space_bytes * LOW_SPACE_HYSTERESIS:
            self.low = False
            self.low_since_ns = None
            return [make_event("low_space_cleared", free_mb=mb, threshold_mb=thr)]
        return []

    def retention(self, open_segment: str | None) -> list[Event]:
        """Delete the oldest closed segments beyond the age or the total size limit."""
        if not (self.retention_days > 0 or self.retention_max_bytes > 0):
            return []
        from straind.store import is_unclosed
        files = []
        for p in segment_files(self.directory, self.station_id):
            try:
                st = p.stat()
            except OSError:
                continue
            files.append((st.st_mtime, p.name, p, st.st_size))
        files.sort()
        total = sum(f[3] for f in files)
        newest = files[-1][2] if files else None
        now = time.time()
        events = []
        for mtime, _, p, size in files:
            age_s = now - mtime
            reason = None
            if self.retention_days > 0 and age_s > self.retention_days * 86400:
                reason = "age"
            elif self.retention_max_bytes > 0 and total > self.retention_max_bytes:
                reason = "size"
            if reason is None:
                continue
            if (p == newest or (open_segment and Path(open_segment) == p)
                    or is_unclosed(p)):
                continue        # never the open segment, nor one a writer holds (or a crash left)
            try:
                p.unlink()
            except OSError as exc:
                log.error("retention: cannot delete %s: %s", p, exc)
                continue
            total -= size
            self.deleted += 1
            self.deleted_bytes += size
            log.info("retention: deleted %s (%s, %.1f MB, %.1f days old)", p.name, reason,
                     size / 1e6, age_s / 86400)
            events.append(make_event("retention_delete", origin="service", file=p.name,
                                     reason=reason, bytes=size, age_days=round(age_s / 86400, 3),
                                     total_bytes_after=total))
        return events


# ----------------------------------------------------------------------------- the upkeep

class Upkeep:
    """Owned by the Service; `tick()` runs on the main thread, `beat()` on device threads."""

    def __init__(self, svc: "Service", notifier: Notifier | None = None):
        self.svc = svc
        self.notifier = notifier or Notifier()
        self.beats = Heartbeats()
        clock_cfg = svc.config.data.get("clock") or {}
        self.sync_mode = clock_cfg.get("sync_check", "adjtimex")
        self.reanchor_on_sync = bool(clock_cfg.get("reanchor_on_sync", True))
        self.clock = ClockWatch(svc.wall_clock_ns, sync_source(self.sync_mode))
        self.disk = DiskWatch(svc.storage_dir, svc.config.station_id, svc.config.storage)
        self.event_counts: collections.Counter[str] = collections.Counter()
        self.storage_fault_since_ns: int | None = None
        self.last_storage_error = ""
        self.pings = 0
        self.pings_withheld = 0
        self.stale: list[str] = []
        self._next_ping = 0.0
        self._next_disk = 0.0
        self._next_retention = 0.0
        self._segments_seen = -1
        self._lock = threading.Lock()

    # -- called from anywhere -------------------------------------------------------------
    def count_event(self, event: Event) -> None:
        with self._lock:
            self.event_counts[event.kind] += 1
        if event.kind == "storage_fault" and self.storage_fault_since_ns is None:
            self.storage_fault_since_ns = event.time_ns

    def clock_synced(self) -> bool:
        """For the runners: is the clock synchronised now (asked when a device anchors)."""
        return self.clock.synced

    def configure(self, config: Any) -> None:
        """Apply the live keys of a reloaded configuration."""
        clock_cfg = config.data.get("clock") or {}
        mode = clock_cfg.get("sync_check", "adjtimex")
        self.reanchor_on_sync = bool(clock_cfg.get("reanchor_on_sync", True))
        if mode != self.sync_mode:
            self.sync_mode = mode
            self.clock._synced_fn = sync_source(mode)
            self.clock._next_sync = 0.0
        self.disk.configure(config.storage)
        self._next_disk = 0.0
        self._next_retention = 0.0

    # -- the main loop --------------------------------------------------------------------
    def tick(self) -> None:
        svc = self.svc
        now = time.monotonic()
        events, sync_changed = self.clock.check()
        for ev in events:
            svc.emit(ev)
        if sync_changed is True and self.reanchor_on_sync:
            names = [r.name_ for r in svc.runners if getattr(r, "anchor_unsynced", False)]
            if names:
                from straind.reload import restart_devices
                restart_devices(svc, names, reason="clock_synced")
        if now >= self._next_disk:
            self._next_disk = now + DISK_CHECK_S
            for ev in self.disk.check_space():
                svc.emit(ev)
        store = svc.store.status() if svc.store is not None else {}
        seg_count = store.get("segments_written", 0)
        if now >= self._next_retention or seg_count != self._segments_seen:
            self._next_retention = now + RETENTION_CHECK_S
            self._segments_seen = seg_count
            for ev in self.disk.retention(store.get("segment_path")):
                svc.emit(ev)
        if store.get("faulted"):
            if self.storage_fault_since_ns is None:
                self.storage_fault_since_ns = svc.wall_clock_ns()
            self.last_storage_error = store.get("last_error", "")
        else:
            self.storage_fault_since_ns = None
        self._watchdog(now, store)

    def timeout_s(self) -> float:
        """How long the main loop may sleep between ticks."""
        iv = self.notifier.ping_interval_s
        return 0.5 if iv is None else max(0.02, min(0.5, iv / 4))

    def _watchdog(self, now: float, store: Mapping[str, Any]) -> None:
        nt = self.notifier
        iv = nt.ping_interval_s
        if iv is None:
            # no service manager watchdog: still show a stuck loop in the status
            self.stale = self.stale_loops(STUCK_WITHOUT_WATCHDOG_S)
            if nt.enabled:
                nt.status(self.summary(store))
            return
        if nt.enabled:
            nt.status(self.summary(store))
        if now < self._next_ping:
            return
        self._next_ping = now + iv
        self.stale = self.stale_loops(max(iv, 0.05))
        if self.stale:
            self.pings_withheld += 1
            if self.pings_withheld == 1 or self.pings_withheld % 10 == 0:
                log.error("watchdog ping withheld: acquisition loop(s) %s gave no heartbeat for "
                          "%.1f s", ", ".join(self.stale), iv)
            return
        self.pings_withheld = 0
        if nt.watchdog():
            self.pings += 1

    def stale_loops(self, max_age_s: float) -> list[str]:
        """Runners whose loop is stuck (no heartbeat) or whose thread died unexpectedly."""
        out = []
        for r in self.svc.runners:
            if r.state in ("finished", "stopped"):
                continue
            if not r.is_alive() and r.ident is not None:
                out.append(r.name_)
            elif self.beats.stale(max_age_s, [r.name_]):
                out.append(r.name_)
        return out

    # -- status ---------------------------------------------------------------------------
    def faults(self) -> list[dict[str, Any]]:
        out: list[dict[str, Any]] = []
        svc = self.svc
        store = svc.store.status() if svc.store is not None else {}
        if store.get("faulted"):
            out.append({"kind": "storage_fault", "since_ns": self.storage_fault_since_ns,
                        "detail": store.get("last_error") or self.last_storage_error,
                        "write_errors": store.get("write_errors", 0)})
        if self.disk.low:
            out.append({"kind": "low_space", "since_ns": self.disk.low_since_ns,
                        "detail": f"{(self.disk.free_bytes or 0) / 1e6:.1f} MB free, threshold "
                                  f"{self.disk.low_space_bytes / 1e6:.1f} MB"})
        if not self.clock.synced:
            out.append({"kind": "clock_unsynced", "since_ns": self.clock.unsynced_since_ns,
                        "detail": "wall clock not synchronised: new anchors flagged "
                                  "CLOCK_UNSYNCED"})
        for r in svc.runners:
            if r.state == "reconnecting":
                out.append({"kind": "device_fault", "device": r.name_, "since_ns": None,
                            "detail": r.last_error, "reconnects": r.reconnects})
        if self.stale:
            out.append({"kind": "acquisition_stuck", "since_ns": None,
                        "detail": f"no heartbeat from {', '.join(self.stale)}"})
        return out

    def status_fields(self) -> dict[str, Any]:
        from straind.logs import suppressed_total
        with self._lock:
            counts = dict(self.event_counts)
        return {
            "faults": self.faults(),
            "counters": {"events": counts, "log_lines_suppressed": suppressed_total(),
                         "reconnects": {r.name_: r.reconnects for r in self.svc.runners}},
            "clock": {"synced": self.clock.synced, "sync_check": self.sync_mode,
                      "steps": self.clock.steps, "last_step": self.clock.last_step},
            "disk": {"free_bytes": self.disk.free_bytes,
                     "low_space_mb": self.disk.low_space_bytes / 1e6,
                     "retention_days": self.disk.retention_days,
                     "retention_max_gb": self.disk.retention_max_bytes / 1e9,
                     "retention_deleted": self.disk.deleted},
            "watchdog": {"enabled": self.notifier.ping_interval_s is not None,
                         "ping_interval_s": self.notifier.ping_interval_s, "pings": self.pings,
                         "stale_loops": list(self.stale)},
        }

    def summary(self, store: Mapping[str, Any] | None = None) -> str:
        """One line for the service manager's STATUS."""
        svc = self.svc
        running = sum(1 for r in svc.runners if r.state == "running")
        parts = [f"{running}/{len(svc.runners)} devices running"]
        rate = sum(r.rate_hz() * len(r.chain.names) for r in svc.runners)
        parts.append(f"{rate:.0f} samples/s")
        faults = [f["kind"] for f in self.faults()]
        parts.append("faults: " + ", ".join(faults) if faults else "no faults")
        return "; ".join(parts)
