"""Structured log lines to stderr (journald keeps them): time, level, component, message.

Each line is ``2026-12-02T06:10:00.123Z level=warning comp=supervisor msg="..."``. Repeated
messages are rate-limited per (component, message template): after `burst` lines in
`window_s` seconds the rest are counted and summarised once the window ends, so a fault that
repeats ten times a second cannot fill the disk, while the counters still see every one.
"""

from __future__ import annotations

import logging
import sys
import threading
import time

__all__ = ["setup_logging", "RateLimitFilter", "suppressed_total"]


class _Formatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        t = time.gmtime(record.created)
        ms = int(record.msecs)
        stamp = time.strftime("%Y-%m-%dT%H:%M:%S", t) + f".{ms:03d}Z"
        comp = record.name.removeprefix("straind.") if record.name != "straind" else "service"
        msg = record.getMessage().replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")
        line = f'{stamp} level={record.levelname.lower()} comp={comp} msg="{msg}"'
        if record.exc_info:
            exc = self.formatException(record.exc_info).replace("\n", "\\n")
            line += f' exc="{exc}"'
        return line


class RateLimitFilter(logging.Filter):
    """Let through at most `burst` records per message template per `window_s` seconds."""

    def __init__(self, burst: int = 5, window_s: float = 60.0):
        super().__init__()
        self.burst, self.window_s = burst, window_s
        self._seen: dict[tuple[str, str], list[float | int]] = {}
        self._lock = threading.Lock()
        #: lines held back since start (the events and counters still see every one)
        self.suppressed_total = 0

    def filter(self, record: logging.LogRecord) -> bool:
        key = (record.name, str(record.msg))
        now = time.monotonic()
        with self._lock:
            slot = self._seen.get(key)
            if slot is None or now - slot[0] > self.window_s:
                suppressed = int(slot[2]) if slot else 0
                self._seen[key] = [now, 1, 0]
                if suppressed:
                    record.msg = f"{record.msg} (and {suppressed} more like it in the last " \
                                 f"{self.window_s:g} s)"
                if len(self._seen) > 10_000:  # bounded memory
                    self._seen.clear()
                return True
            slot[1] = int(slot[1]) + 1
            if slot[1] <= self.burst:
                return True
            slot[2] = int(slot[2]) + 1
            self.suppressed_total += 1
            return False


def setup_logging(level: str = "info") -> logging.Logger:
    """Configure the `straind` logger once: stderr, structured, rate-limited."""
    logger = logging.getLogger("straind")
    if not any(getattr(h, "_straind", False) for h in logger.handlers):
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(_Formatter())
        handler.addFilter(RateLimitFilter())
        handler._straind = True  # type: ignore[attr-defined]
        logger.addHandler(handler)
        logger.propagate = False
    logger.setLevel(level.upper())
    return logger


def suppressed_total() -> int:
    """Log lines the rate limit held back so far (shown by `straind status`)."""
    logger = logging.getLogger("straind")
    return sum(getattr(f, "suppressed_total", 0) for h in logger.handlers for f in h.filters)
