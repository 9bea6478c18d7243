"""The service manager's notification protocol, and the watchdog fed by the acquisition loops.

When started by a service manager with ``Type=notify``, the environment holds ``NOTIFY_SOCKET``
(a Unix datagram socket path, or an abstract address written with a leading ``@``). Each
message is one datagram of newline-separated ``KEY=value`` lines: ``READY=1`` once the service
runs, ``STATUS=...`` a one-line health summary, ``WATCHDOG=1`` a keep-alive ping,
``RELOADING=1`` with ``MONOTONIC_USEC=...`` at the start of a configuration reload (``READY=1``
ends it), ``STOPPING=1`` at the start of a shutdown. ``WATCHDOG_USEC`` (and, when set,
``WATCHDOG_PID``, which must be our pid) says how often the manager expects a ping; we ping at
half that interval.

The pings are earned, not sent by a timer: every device thread calls its runner's heartbeat
once per read cycle (and during its backoff waits), and the main loop sends ``WATCHDOG=1`` only
while every live runner has beaten within the ping interval. One stuck acquisition loop (a
driver hanging inside read_block, open or close) therefore stops the pings, and the manager
restarts the service.
"""

from __future__ import annotations

import os
import socket
import threading
import time
from typing import Callable, Iterable, Mapping

__all__ = ["Notifier", "Heartbeats", "watchdog_usec_from_env"]

#: Largest STATUS text sent (one short line).
MAX_STATUS_CHARS = 200


def watchdog_usec_from_env(env: Mapping[str, str] | None = None) -> int | None:
    """The watchdog timeout in microseconds the manager asked for, or None (no watchdog)."""
    env = os.environ if env is None else env
    raw = env.get("WATCHDOG_USEC", "")
    try:
        usec = int(raw)
    except ValueError:
        return None
    if usec <= 0:
        return None
    pid = env.get("WATCHDOG_PID", "")
    if pid:
        try:
            if int(pid) != os.getpid():
                return None        # meant for another process (e.g. a wrapper's parent)
        except ValueError:
            return None
    return usec


def _address(raw: str) -> str | bytes | None:
    if not raw:
        return None
    if raw.startswith("@"):
        return b"\0" + raw[1:].encode()      # Linux abstract namespace
    if raw.startswith("/"):
        return raw
    return None                              # vsock and others: not supported here


class Notifier:
    """Sends notification datagrams; every method is a no-op when no manager listens."""

    def __init__(self, env: Mapping[str, str] | None = None):
        env = os.environ if env is None else env
        self.address = _address(env.get("NOTIFY_SOCKET", ""))
        usec = watchdog_usec_from_env(env)
        #: ping interval (s): half the manager's timeout; None when there is no watchdog
        self.ping_interval_s: float | None = None if usec is None else usec / 2e6
        self.sent = 0
        self.errors = 0
        self._lock = threading.Lock()
        self._sock: socket.socket | None = None
        self._last_status = ""

    @property
    def enabled(self) -> bool:
        return self.address is not None

    def send(self, **fields: str | int) -> bool:
        """Send one message (KEY=value lines); False when not sent."""
        if self.address is None:
            return False
        msg = "\n".join(f"{k}={v}" for k, v in fields.items()).encode("utf-8", "replace")
        with self._lock:
            try:
                if self._sock is None:
                    self._sock = socket.socket(socket.AF_UNIX,
                                               socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
                self._sock.sendto(msg, self.address)
            except OSError:
                self.errors += 1
                return False
            self.sent += 1
            return True

    def ready(self, status: str | None = None) -> bool:
        fields: dict[str, str | int] = {"READY": 1}
        if status:
            fields["STATUS"] = _one_line(status)
            self._last_status = fields["STATUS"]  # type: ignore[assignment]
        return self.send(**fields)

    def status(self, text: str) -> bool:
        """Send STATUS only when it changed."""
        text = _one_line(text)
        if text == self._last_status:
            return True
        self._last_status = text
        return self.send(STATUS=text)

    def watchdog(self) -> bool:
        return self.send(WATCHDOG=1)

    def reloading(self) -> bool:
        return self.send(RELOADING=1, MONOTONIC_USEC=time.clock_gettime_ns(time.CLOCK_MONOTONIC)
                         // 1000)

    def stopping(self, status: str | None = None) -> bool:
        fields: dict[str, str | int] = {"STOPPING": 1}
        if status:
            fields["STATUS"] = _one_line(status)
        return self.send(**fields)

    def close(self) -> None:
        with self._lock:
            if self._sock is not None:
                self._sock.close()
                self._sock = None


def _one_line(text: str) -> str:
    return " ".join(str(text).split())[:MAX_STATUS_CHARS]


class Heartbeats:
    """Last heartbeat (monotonic s) of each acquisition loop, keyed by runner name.

    `beat(name)` is called from the device threads (one dict store: no lock needed);
    `stale(max_age_s, names)` is asked by the main loop before it pings.
    """

    def __init__(self, clock: Callable[[], float] = time.monotonic):
        self.clock = clock
        self._last: dict[str, float] = {}

    def arm(self, name: str) -> None:
        """A loop starts (or restarts): count it as fresh from now."""
        self._last[name] = self.clock()

    def beat(self, name: str) -> None:
        self._last[name] = self.clock()

    def forget(self, name: str) -> None:
        self._last.pop(name, None)

    def age_s(self, name: str) -> float | None:
        t = self._last.get(name)
        return None if t is None else self.clock() - t

    def stale(self, max_age_s: float, names: Iterable[str]) -> list[str]:
        """Names whose last beat is older than max_age_s (or that never beat nor were armed)."""
        now = self.clock()
        return [n for n in names if now - self._last.get(n, -1e18) > max_age_s]
