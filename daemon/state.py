"""Persistent channel state: zeros (tares) and calibration, written atomically, reloaded at start.

The file is JSON. Each write goes to a temporary file in the same directory, is fsynced, renamed
over the old file, and the directory is fsynced, so a power cut leaves either the old or the new
state, never a torn one. A zero is never re-taken silently: only an explicit tare (or
``tare.at_start`` when no zero is stored) changes it, and each change is an event.
"""

from __future__ import annotations

import json
import os
import tempfile
import threading
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

__all__ = ["ChannelState", "StateStore", "StateError", "atomic_write"]

STATE_FORMAT = 1


class StateError(RuntimeError):
    """The state file exists but cannot be used; the service refuses to start rather than
    silently losing the zeros of a running campaign."""


@dataclass
class ChannelState:
    """What is kept about one channel between runs.

    zero_ratio:          measured bridge ratio (V/V) averaged at the tare; None = never tared.
    zero_taken_ns:       UTC ns of the end of the tare average.
    zero_samples:        samples averaged.
    zero_origin:         who asked for it (control-socket, mqtt, at_start).
    shunt_gain:          measured/expected from the last shunt calibration (None = never).
    gain_correction:     factor applied to the channel's values (1.0 unless applied by the user).
    calibration_version: increases by one with every change of zero or gain correction.
    temperature_at_zero_c: temperature of a linked temperature channel at tare, if any.
    """

    zero_ratio: float | None = None
    zero_taken_ns: int | None = None
    zero_samples: int = 0
    zero_origin: str = ""
    shunt_gain: float | None = None
    shunt_taken_ns: int | None = None
    gain_correction: float = 1.0
    calibration_version: int = 0
    temperature_at_zero_c: float | None = None
    extra: dict[str, Any] = field(default_factory=dict)


def atomic_write(path: Path, data: bytes) -> None:
    """Replace `path` with `data` so that a crash leaves the old or the new content."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    dfd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)


class StateStore:
    """Channel states keyed by "device/channel", backed by one JSON file."""

    def __init__(self, path: Path, station_id: str):
        self.path = Path(path)
        self.station_id = station_id
        self._lock = threading.Lock()
        self._channels: dict[str, ChannelState] = {}
        self.unclean_previous_stop = False
        self._load()

    @staticmethod
    def key(device: str, channel: str) -> str:
        return f"{device}/{channel}"

    def _load(self) -> None:
        if not self.path.exists():
            return
        try:
            doc = json.loads(self.path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise StateError(f"state file {self.path} cannot be read ({exc}); it holds the zeros "
                             "of the channels. Restore it or move it away to start without "
                             "zeros.") from None
        if doc.get("format") != STATE_FORMAT:
            raise StateError(f"state file {self.path} has format {doc.get('format')!r}, "
                             f"expected {STATE_FORMAT}")
        known = set(ChannelState.__dataclass_fields__)
        for key, value in doc.get("channels", {}).items():
            self._channels[key] = ChannelState(**{k: v for k, v in value.items() if k in known})
        self.unclean_previous_stop = bool(doc.get("running", False))

    def get(self, device: str, channel: str) -> ChannelState:
        with self._lock:
            return self._channels.setdefault(self.key(device, channel), ChannelState())

    def zeros(self, device: str) -> dict[str, float]:
        prefix = device + "/"
        with self._lock:
            return {k[len(prefix):]: v.zero_ratio for k, v in self._channels.items()
                    if k.startswith(prefix) and v.zero_ratio is not None}

    def gains(self, device: str) -> dict[str, float]:
        """Gain corrections the user applied (channel -> factor), for channels that have one."""
        prefix = device + "/"
        with self._lock:
            return {k[len(prefix):]: v.gain_correction for k, v in self._channels.items()
                    if k.startswith(prefix) and v.gain_correction != 1.0}

    def update(self, device: str, channel: str, **changes: Any) -> ChannelState:
        """Change fields of one channel, bump its calibration version, and save atomically."""
        with self._lock:
            st = self._channels.setdefault(self.key(device, channel), ChannelState())
            for k, v in changes.items():
                if not hasattr(st, k):
                    raise AttributeError(k)
                setattr(st, k, v)
            st.calibration_version += 1
            self._save_locked(running=True)
            return ChannelState(**asdict(st))

    def mark_running(self, running: bool) -> None:
        """Record whether the service is running, so the next start can detect an unclean stop."""
        with self._lock:
            self._save_locked(running=running)

    def _save_locked(self, running: bool) -> None:
        doc = {"format": STATE_FORMAT, "station": self.station_id, "running": running,
               "channels": {k: asdict(v) for k, v in sorted(self._channels.items())}}
        atomic_write(self.path, json.dumps(doc, indent=1, sort_keys=True).encode("utf-8"))
