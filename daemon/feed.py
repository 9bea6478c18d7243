"""The MQTT feed: live values, full-rate batches, status, metadata and events for plant systems.

A sink of the service. `Feed.submit` is called by acquisition with every engineering block and
never blocks: it summarises the block per publish interval with numpy (O(block)) and queues the
result; everything else (JSON, binary encoding, the disk outbox, the network) happens on the
feed's own thread and on paho's network thread.

Topics, all under ``<topic_prefix>/<station_id>/`` (see the project's feed documentation):

    status                    retained JSON: online/offline and why, health; also the last will
    meta                      retained JSON: devices, channels, units, sensor/calibration attrs
    values/<device>/<channel> JSON per publish interval: mean, min, max, last, count, quality
    full/<device>             binary full-rate batches (layout in `BATCH_HEADER` / `encode_batch`)
    events                    JSON of each event (tare, gaps, alarms, feed drops ...)
    cmd                       remote commands in (only acted on when commands are enabled)
    cmd/reply                 command replies (MQTT 5: or the request's ResponseTopic)

QoS 1 data (values, full-rate batches and events) are appended to the disk outbox
(`straind.outbox`) first and published from it in order, at most ``max_inflight`` at a time;
a record leaves the outbox only when the broker's PUBACK for it arrives. Every message carries a
per-topic sequence number (``seq``) that continues across restarts, so a subscriber drops the
duplicates a replay may bring by ignoring any ``seq`` it has already seen on that topic.

When the outbox cannot write (disk full, read-only file system) the feed goes on: new QoS 1
messages get their sequence numbers as usual and wait in a memory queue bounded in bytes (a
quarter of ``outbox.max_mb``, beyond it the oldest are dropped, counted and announced), and
are published from there after whatever the outbox still holds. The outbox is tried again
every `Feed.outbox_retry_s` once its file system has room again; once it writes, the memory queue is appended to it in order and
everything goes through it again. The state shows in `Feed.status()` (``outbox.state``), and
an ``outbox_unwritable`` / ``outbox_recovered`` event marks each change.
"""

from __future__ import annotations

import collections
import copy
import json
import logging
import math
import os
import re
import shutil
import ssl
import struct
import threading
import time
import zlib
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from straind.block import UNUSABLE, EngineeringBlock, Quality
from straind.events import Event, make_event
from straind.layout import DeviceLayout
from straind.outbox import Outbox
from straind.schema import ConfigError, Field, ListOf, Section, validate

try:  # the control module owns the error type; fall back while it does not exist
    from straind.control import CommandError  # type: ignore[attr-defined]
except ImportError:  # pragma: no cover - depends on the state of the service core
    class CommandError(ValueError):
        """A remote or local command that cannot be carried out (bad name or arguments)."""

__all__ = [
    "MQTT_SECTION",
    "Feed",
    "FeedTopics",
    "IntervalStats",
    "summarise",
    "merge_stats",
    "BATCH_MAGIC",
    "BATCH_VERSION",
    "BATCH_HEADER",
    "FullRateBatch",
    "encode_batch",
    "decode_batch",
    "redact_secrets",
    "redact_config_text",
    "CommandError",
    "iso_utc",
]

#: Samples with these bits are left out of the interval statistics (and counted as unusable):
#: the chain's unusable bits, plus SHUNT_ON because a shunt step is not a measurement of load.
EXCLUDE_FROM_STATS = int(UNUSABLE | Quality.SHUNT_ON)
#: submitted blocks the feed thread takes per step before it sends what is ready
INPUTS_PER_STEP = 16
#: a device's parts of one interval are folded together at its end or once this many wait
MERGE_EVERY = 32

# --------------------------------------------------------------------------------------- schema


def _protocol(value: Any, path: str, line: int | None) -> str:
    text = str(value).strip().lower()
    if text in ("5", "5.0", "v5", "mqttv5"):
        return "5"
    if text in ("3.1.1", "311", "v311", "mqttv311"):
        return "3.1.1"
    raise ConfigError(path, f"must be 3.1.1 or 5, got {value!r}", line)


def _full_rate(value: Any, path: str, line: int | None) -> bool | list[str]:
    if isinstance(value, bool):
        return value
    if isinstance(value, list) and all(isinstance(v, str) for v in value):
        return list(value)
    raise ConfigError(path, f"expected true, false or a list of device names, got {value!r}", line)


def _check_mqtt(cfg: dict, path: str, source: Any) -> None:
    sources = [k for k in ("password", "password_file", "password_env") if cfg.get(k)]
    if len(sources) > 1:
        raise ConfigError(f"{path}.{sources[1]}", f"give only one of password, password_file, "
                          f"password_env (found {', '.join(sources)})")
    if sources and not cfg.get("username"):
        raise ConfigError(f"{path}.username", "a password needs a username")
    if cfg["reconnect_min_s"] > cfg["reconnect_max_s"]:
        raise ConfigError(f"{path}.reconnect_min_s", "must not exceed reconnect_max_s")
    tls = cfg["tls"]
    if tls["key_file"] and not tls["cert_file"]:
        raise ConfigError(f"{path}.tls.key_file", "a client key needs tls.cert_file")
    for key in ("ca_file", "cert_file", "key_file"):
        if tls[key]:
            tls["enabled"] = True


MQTT_SECTION = Section({
    "enabled": Field(bool, True, "publish the feed (false: the sink does nothing)"),
    "host": Field(str, "localhost", "broker host name or address"),
    "port": Field(int, 1883, "broker TCP port (8883 is usual with TLS)", min=1, max=65535),
    "protocol": Field(_protocol, "5", "MQTT protocol version: 3.1.1 or 5"),
    "client_id": Field(str, "", "client id; empty: straind-<station id>. Must be stable: the "
                                "broker keeps the session under it"),
    "keepalive_s": Field(int, 30, "keep-alive; the broker publishes the last will after about "
                                  "1.5 times this without traffic", unit="s", min=1, max=65535),
    "topic_prefix": Field(str, "straind", "first topic level; topics are "
                                          "<topic_prefix>/<station id>/..."),
    "qos": Field(int, 1, "QoS of values and full-rate batches: 1 goes through the disk outbox "
                         "(nothing lost), 0 is published only while connected", choices=(0, 1)),
    "retain_values": Field(bool, False, "retain each channel's latest value message"),
    "publish_interval_s": Field(float, 1.0, "summary interval of the per-channel value "
                                            "messages (aligned to UTC multiples)", unit="s",
                                min=0.01, max=86400.0),
    "full_rate": Field(_full_rate, False, "publish every sample in binary batches: true (all "
                                          "devices), false, or a list of device names"),
    "full_rate_dtype": Field(str, "float32", "value type in full-rate batches",
                             choices=("float32", "float64")),
    "full_rate_quality": Field(bool, True, "append the per-sample quality bytes to batches"),
    "batch_samples": Field(int, 0, "samples per full-rate message; 0: one message per block",
                           unit="samples", min=0, max=10_000_000),
    "status_interval_s": Field(float, 10.0, "how often the retained status is refreshed",
                               unit="s", min=0.5),
    "max_inflight": Field(int, 64, "QoS 1 messages sent and not yet acknowledged, at most",
                          unit="messages", min=1, max=65000),
    "queue_blocks": Field(int, 1000, "blocks waiting for the feed thread, at most (beyond: "
                                     "dropped, counted, announced)", unit="blocks", min=1),
    "session_expiry_s": Field(int, 86400, "MQTT 5: how long the broker keeps the session "
                                          "after a disconnect", unit="s", min=0,
                              max=4294967295),
    "reconnect_min_s": Field(float, 1.0, "first reconnect delay; doubles per failed attempt",
                             unit="s", min=0.01),
    "reconnect_max_s": Field(float, 30.0, "cap of the reconnect delay", unit="s", min=0.01),
    "outbox": Section({
        "path": Field(str, None, "outbox directory; empty: <state dir>/mqtt-outbox",
                      nullable=True),
        "max_mb": Field(float, 256.0, "bound of the outbox on disk; when full the oldest "
                                      "unsent messages are dropped, counted and announced",
                        unit="MiB", min=0.01),
        "sync_interval_s": Field(float, 0.5, "fsync interval of the outbox (a power loss may "
                                             "take this much)", unit="s", min=0.0),
    }),
    "tls": Section({
        "enabled": Field(bool, False, "use TLS (implied by any file below); without ca_file "
                                      "the system's trusted CAs are used"),
        "ca_file": Field(str, None, "PEM file of the CA(s) that signed the broker certificate",
                         nullable=True),
        "cert_file": Field(str, None, "PEM client certificate (brokers that require one)",
                           nullable=True),
        "key_file": Field(str, None, "PEM key of the client certificate", nullable=True),
        "verify_hostname": Field(bool, True, "check the broker certificate names the host; "
                                             "false only for testing (logged as a warning)"),
    }),
    "username": Field(str, None, "user name at the broker", nullable=True),
    "password_file": Field(str, None, "file holding the password (first line; keep it mode "
                                      "0600)", nullable=True),
    "password_env": Field(str, None, "name of an environment variable holding the password",
                          nullable=True),
    "password": Field(str, None, "inline password: allowed, warned about when the "
                                 "configuration file is readable by others", nullable=True),
    "commands": Section({
        "enabled": Field(bool, False, "act on remote commands on <prefix>/<station>/cmd"),
        "allow": ListOf(Field(str), default=[], doc="command names accepted; empty: all "
                                                      "(the service decides)"),
        "log_ignored_every": Field(int, 100, "while disabled, log the 1st and every N-th "
                                             "ignored command message", min=1),
    }),
}, doc="MQTT feed to plant systems", check=_check_mqtt)

# ---------------------------------------------------------------------------------- topics


def _topic_level(name: str) -> str:
    """A device or channel name made safe as one topic level."""
    out = re.sub(r"[/+#\x00]", "_", str(name))
    return out or "_"


class FeedTopics:
    """Topic names of one station."""

    def __init__(self, prefix: str, station_id: str):
        prefix = prefix.strip("/")
        self.base = f"{prefix}/{_topic_level(station_id)}" if prefix else _topic_level(station_id)
        self.status = f"{self.base}/status"
        self.meta = f"{self.base}/meta"
        self.events = f"{self.base}/events"
        self.cmd = f"{self.base}/cmd"
        self.reply = f"{self.base}/cmd/reply"

    def values(self, device: str, channel: str) -> str:
        return f"{self.base}/values/{_topic_level(device)}/{_topic_level(channel)}"

    def full(self, device: str) -> str:
        return f"{self.base}/full/{_topic_level(device)}"

    def as_dict(self) -> dict[str, str]:
        return {"status": self.status, "meta": self.meta, "events": self.events,
                "values": f"{self.base}/values/+/+", "full_rate": f"{self.base}/full/+",
                "commands": self.cmd, "replies": self.reply}


# ---------------------------------------------------------------------------- summaries


@dataclass
class IntervalStats:
    """Statistics of a device's columns over (part of) one publish interval.

    index: interval number; the interval is [index * interval_ns, (index + 1) * interval_ns).
    Per column (k,): count (usable samples), total (their sum), vmin, vmax, last (last usable
    value, NaN if none), last_ns (its time, -1 if none), unusable (samples left out), flags (OR
    of the quality bits of every sample).
    """

    index: int
    count: np.ndarray
    total: np.ndarray
    vmin: np.ndarray
    vmax: np.ndarray
    last: np.ndarray
    last_ns: np.ndarray
    unusable: np.ndarray
    flags: np.ndarray
    first_ns: int
    end_ns: int       # time of the last sample seen (usable or not)



def merge_stats(parts: Sequence[IntervalStats]) -> IntervalStats:
    """The statistics of consecutive parts of one interval, as if taken over all their samples.

    One stacked reduction per field for the lot (the feed folds a device's parts once per
    interval, or every MERGE_EVERY parts, rather than a dozen small operations per block). The
    sums add part by part in order, as a running total would.
    """
    if len(parts) == 1:
        return parts[0]
    count = np.stack([p.count for p in parts])
    has = count > 0
    # per column, the last part that had a usable sample (argmax finds the first True)
    latest = (len(parts) - 1) - has[::-1].argmax(axis=0)
    cols = np.arange(count.shape[1])
    any_usable = has.any(axis=0)
    last = np.where(any_usable, np.stack([p.last for p in parts])[latest, cols], parts[0].last)
    last_ns = np.where(any_usable, np.stack([p.last_ns for p in parts])[latest, cols],
                       parts[0].last_ns)
    return IntervalStats(parts[0].index, count.sum(axis=0),
                         np.stack([p.total for p in parts]).sum(axis=0),
                         np.stack([p.vmin for p in parts]).min(axis=0),
                         np.stack([p.vmax for p in parts]).max(axis=0),
                         last, last_ns.astype(np.int64),
                         np.stack([p.unusable for p in parts]).sum(axis=0),
                         np.bitwise_or.reduce(np.stack([p.flags for p in parts]), axis=0),
                         min(p.first_ns for p in parts), max(p.end_ns for p in parts))


#: rows laid side by side in _column_sum_min_max; the final fold of 8 x k values stays under
#: the size from which numpy lets go of the GIL (see _any_bit_set)
_FOLD_ROWS = 8
_ZERO_BYTES: dict[int, bytes] = {}


def _any_bit_set(quality: np.ndarray) -> bool:
    """Is any quality byte non-zero? A bytes comparison rather than `quality.any()`: numpy
    releases the GIL for reductions over more than a few hundred elements, and on a feed whose
    threads all want it, each release costs a wait for the others' turn (measured with a busy
    second thread: ~300 us for a 32 x 1000 block against 3 us alone); the comparison (a
    memcmp) keeps it."""
    data = quality.tobytes()
    zero = _ZERO_BYTES.get(len(data))
    if zero is None:
        if len(_ZERO_BYTES) > 16:
            _ZERO_BYTES.clear()
        zero = _ZERO_BYTES[len(data)] = bytes(len(data))
    return data != zero


def _column_sum_min_max(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-column sum, min and max of an (n, k) array.

    numpy reduces over axis 0 of a row-major array one short row at a time; seen as
    (n / F, F k) the rows are F times longer, and the F partial results per column are folded
    at the end (about 35 us against 43 for a transposed copy and three row reductions, on a
    32 x 1000 block, and three releases of the GIL rather than six). The sum adds in another
    order than `values.sum(axis=0)`: equal to rounding.
    """
    n, k = values.shape
    m = n - n % _FOLD_ROWS
    if m == 0:
        return values.sum(axis=0), values.min(axis=0), values.max(axis=0)
    wide = values[:m].reshape(m // _FOLD_ROWS, _FOLD_ROWS * k)
    total = wide.sum(axis=0).reshape(_FOLD_ROWS, k).sum(axis=0)
    vmin = wide.min(axis=0).reshape(_FOLD_ROWS, k).min(axis=0)
    vmax = wide.max(axis=0).reshape(_FOLD_ROWS, k).max(axis=0)
    if m < n:
        rest = values[m:]
        total += rest.sum(axis=0)
        np.minimum(vmin, rest.min(axis=0), out=vmin)
        np.maximum(vmax, rest.max(axis=0), out=vmax)
    return total, vmin, vmax


def _stats(values: np.ndarray, quality: np.ndarray, t0_ns: int, period_ns: int,
           index: int) -> IntervalStats:
    n, k = values.shape
    flags = (np.bitwise_or.reduce(quality, axis=0).astype(np.uint8)
             if n and _any_bit_set(quality) else np.zeros(k, np.uint8))
    if n and not (flags & EXCLUDE_FROM_STATS).any():
        # the usual case, every sample usable: three column reductions (_column_sum_min_max).
        # A sum is finite only if every term is (NaN and inf propagate), so the finite sums
        # stand in for a separate pass of isfinite; an overflow to inf takes the general path.
        total, vmin, vmax = _column_sum_min_max(values)
        if np.isfinite(total).all():
            return IntervalStats(index, np.full(k, n, np.int64), total,
                                 vmin, vmax, values[-1].copy(),
                                 np.full(k, t0_ns + (n - 1) * period_ns, np.int64),
                                 np.zeros(k, np.int64), flags, t0_ns, t0_ns + (n - 1) * period_ns)
    bad = (quality & EXCLUDE_FROM_STATS) != 0
    bad |= ~np.isfinite(values)
    good = ~bad
    count = good.sum(axis=0, dtype=np.int64)
    total = np.where(good, values, 0.0).sum(axis=0)
    vmin = np.where(good, values, np.inf).min(axis=0)
    vmax = np.where(good, values, -np.inf).max(axis=0)
    has = count > 0
    last_i = (n - 1) - good[::-1].argmax(axis=0)
    last = np.where(has, values[last_i, np.arange(k)], np.nan)
    last_ns = np.where(has, t0_ns + last_i.astype(np.int64) * period_ns, -1)
    return IntervalStats(index, count, total, vmin, vmax, last, last_ns.astype(np.int64),
                         n - count, flags, t0_ns, t0_ns + (n - 1) * period_ns)


def summarise(values: np.ndarray, quality: np.ndarray, t0_ns: int, period_ns: int,
              interval_ns: int) -> list[IntervalStats]:
    """Split a block at UTC interval boundaries and summarise each part (vectorised per part).

    NaN, infinite and flagged (EXCLUDE_FROM_STATS) samples are left out of count, sum, min, max
    and last and counted in `unusable`.
    """
    values = np.asarray(values, dtype=np.float64)
    quality = np.asarray(quality, dtype=np.uint8)
    n = values.shape[0]
    if n == 0:
        return []
    t0_ns, period_ns, interval_ns = int(t0_ns), int(period_ns), int(interval_ns)
    k_first = t0_ns // interval_ns
    k_last = (t0_ns + (n - 1) * period_ns) // interval_ns
    if k_first == k_last:
        return [_stats(values, quality, t0_ns, period_ns, k_first)]
    times = t0_ns + np.arange(n, dtype=np.int64) * np.int64(period_ns)
    idx = times // np.int64(interval_ns)
    cuts = np.flatnonzero(np.diff(idx)) + 1
    bounds = [0, *cuts.tolist(), n]
    out = []
    for a, b in zip(bounds[:-1], bounds[1:]):
        out.append(_stats(values[a:b], quality[a:b], t0_ns + a * period_ns, period_ns,
                          int(idx[a])))
    return out


# ------------------------------------------------------------------------ binary batches

BATCH_MAGIC = b"SDFB"
BATCH_VERSION = 1
#: magic, version, flags, header_len, seq, first_time_ns, period_ns, start_index, n_samples,
#: n_channels, reserved, layout_crc  (little-endian, 52 bytes)
BATCH_HEADER = struct.Struct("<4sBBHQqqQIHHI")
FLAG_FLOAT64 = 0x01
FLAG_QUALITY = 0x02


@dataclass(frozen=True)
class FullRateBatch:
    """A decoded full-rate message."""

    seq: int
    first_time_ns: int
    period_ns: int
    start_index: int
    values: np.ndarray          # (n_samples, n_channels) float32 or float64, NaN = unusable
    quality: np.ndarray | None  # (n_samples, n_channels) uint8 Quality bits, if sent
    layout_crc: int

    @property
    def n_samples(self) -> int:
        return int(self.values.shape[0])

    def times_ns(self) -> np.ndarray:
        return self.first_time_ns + np.arange(self.n_samples, dtype=np.int64) * self.period_ns


def _cast_body(out: np.ndarray, values: np.ndarray, quality: np.ndarray | None,
               dtype: str) -> None:
    """Cast values (then quality bytes) into the uint8 buffer `out`, which fits them exactly."""
    n, k = values.shape
    vdt = np.dtype("<f8" if dtype == "float64" else "<f4")
    nv = n * k * vdt.itemsize
    out[:nv].view(vdt).reshape(n, k)[...] = values
    if quality is not None:
        out[nv:].reshape(n, k)[...] = quality


def _body_bytes(n: int, k: int, quality: np.ndarray | None, dtype: str) -> int:
    return n * k * (8 if dtype == "float64" else 4) + (n * k if quality is not None else 0)


def encode_batch(seq: int, first_time_ns: int, period_ns: int, start_index: int,
                 values: np.ndarray, quality: np.ndarray | None, dtype: str = "float32",
                 layout_crc: int = 0) -> bytes:
    """One full-rate message: 52-byte header, values row-major (sample-major), quality bytes.

    Header and body are written into one preallocated buffer and copied out once (a join of
    separate parts would copy the 100 kB-sized body once more).
    """
    values = np.asarray(values)
    n, k = values.shape
    flags = (FLAG_FLOAT64 if dtype == "float64" else 0) | (FLAG_QUALITY if quality is not None else 0)
    out = np.empty(BATCH_HEADER.size + _body_bytes(n, k, quality, dtype), np.uint8)
    BATCH_HEADER.pack_into(out, 0, BATCH_MAGIC, BATCH_VERSION, flags, BATCH_HEADER.size,
                           int(seq), int(first_time_ns), int(period_ns), int(start_index), n, k,
                           0, int(layout_crc) & 0xFFFFFFFF)
    _cast_body(out[BATCH_HEADER.size:], values, quality, dtype)
    return out.tobytes()


def decode_batch(payload: bytes) -> FullRateBatch:
    """Parse a full-rate message; raises ValueError if it is not one."""
    if len(payload) < BATCH_HEADER.size:
        raise ValueError("too short for a full-rate batch header")
    (magic, version, flags, header_len, seq, first_ns, period_ns, start_index, n, k, _,
     layout_crc) = BATCH_HEADER.unpack_from(payload, 0)
    if magic != BATCH_MAGIC:
        raise ValueError(f"bad magic {magic!r}")
    if version != BATCH_VERSION:
        raise ValueError(f"unsupported batch version {version}")
    width = 8 if flags & FLAG_FLOAT64 else 4
    need = header_len + n * k * width + (n * k if flags & FLAG_QUALITY else 0)
    if len(payload) != need:
        raise ValueError(f"batch length {len(payload)} does not match its header ({need})")
    values = np.frombuffer(payload, dtype="<f8" if width == 8 else "<f4", count=n * k,
                           offset=header_len).reshape(n, k)
    quality = None
    if flags & FLAG_QUALITY:
        quality = np.frombuffer(payload, dtype=np.uint8, count=n * k,
                                offset=header_len + n * k * width).reshape(n, k)
    return FullRateBatch(seq, first_ns, period_ns, start_index, values, quality, layout_crc)


# ------------------------------------------------------------------------------- helpers


def iso_utc(time_ns: int) -> str:
    """ISO 8601 UTC with microseconds and a Z (the exact ns are beside it as *_ns)."""
    sec, ns = divmod(int(time_ns), 1_000_000_000)
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(sec)) + f".{ns // 1000:06d}Z"


def _json_safe(obj: Any) -> Any:
    """Plain JSON types only; non-finite floats become null."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, (str, int, bool)) or obj is None:
        return obj
    if isinstance(obj, Mapping):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, np.generic):
        return _json_safe(obj.item())
    if isinstance(obj, np.ndarray):
        return _json_safe(obj.tolist())
    return str(obj)


def _dumps(obj: Any) -> bytes:
    return json.dumps(_json_safe(obj), separators=(",", ":"), allow_nan=False,
                      ensure_ascii=False).encode("utf-8")


def _flag_names(bits: int) -> list[str]:
    return [f.name.lower() for f in Quality if f.value and bits & f.value]


_SECRET_KEYS = ("password",)
REDACTED = "<redacted>"


def redact_secrets(config: Mapping) -> Mapping:
    """Deep copy of a configuration with every password value replaced by "<redacted>".

    For the configuration copy stored with the data and for logs. Works on the whole
    configuration or on the `mqtt` section alone; names of files and environment variables
    (password_file, password_env) are kept, they are not secrets.
    """
    def walk(node: Any) -> Any:
        if isinstance(node, Mapping):
            out = {}
            for key, value in node.items():
                if str(key).lower() in _SECRET_KEYS and value not in (None, ""):
                    out[key] = REDACTED
                else:
                    out[key] = walk(value)
            return out
        if isinstance(node, list):
            return [walk(v) for v in node]
        return copy.deepcopy(node)
    return walk(config)


_PASSWORD_LINE = re.compile(r"^(\s*(?:-\s+)?password\s*:\s*)(?!\s*(?:#|$|null\b|~))(.*)$",
                            re.MULTILINE)


def redact_config_text(text: str) -> str:
    """The YAML text of a configuration with inline `password:` values replaced."""
    return _PASSWORD_LINE.sub(lambda m: m.group(1) + f'"{REDACTED}"', text)


def _readable_by_others(path: str) -> bool:
    try:
        return bool(os.stat(path).st_mode & 0o044)
    except OSError:
        return False


def _is_command_error(exc: BaseException) -> bool:
    return isinstance(exc, (CommandError, ValueError)) or type(exc).__name__ == "CommandError"


class _Client(mqtt.Client):
    """paho client that reports why a connection attempt failed (paho only retries)."""

    straind_on_fail: Callable[[BaseException], None] | None = None

    def reconnect(self) -> MQTTErrorCode:
        try:
            return super().reconnect()
        except OSError as exc:
            if self.straind_on_fail is not None:
                self.straind_on_fail(exc)
            raise


@dataclass
class _MemMsg:
    """A QoS 1 message kept in memory while the outbox cannot write."""

    topic: str
    payload: bytes
    retain: bool
    seq: int
    time_ns: int

    @property
    def size(self) -> int:
        return len(self.payload) + len(self.topic) + 64


@dataclass
class _DeviceState:
    name: str
    layout: DeviceLayout | None
    full_rate: bool
    names: tuple[str, ...] = ()
    units: tuple[str, ...] = ()
    acc: IntervalStats | None = None
    acc_more: list = field(default_factory=list)   # later parts of acc's interval, unfolded
    last_input_mono: float = 0.0
    batch: list | None = None          # [(values, quality, start_index, t0_ns)]
    batch_rows: int = 0
    batch_period_ns: int = 0
    batch_next_index: int = -1
    batch_next_t_ns: int = 0
    batch_first_mono: float = 0.0


# ---------------------------------------------------------------------------------- the feed


class Feed:
    """The MQTT sink: see the module docstring for topics and guarantees.

    mqtt:            the `mqtt` configuration (validated against MQTT_SECTION here as well).
    station_id:      second topic level.
    devices:         layouts of the devices whose blocks will be submitted.
    metadata:        station and channel metadata published retained on the meta topic.
    status_provider: returns the service's health (samples_per_s, drops, queue depth, disk
                     free, clock state ...), merged into the retained status.
    on_command:      (name, args, origin) -> reply dict; raise CommandError for a bad command.
    config_path:     the configuration file (to warn when an inline password is readable).
    state_dir:       where the outbox goes when mqtt.outbox.path is not set.
    on_event:        receives the events the feed itself raises (drops), for the event store.
    """

    def __init__(self, mqtt: Mapping, station_id: str, devices: Sequence[DeviceLayout],
                 metadata: Mapping[str, Any], status_provider: Callable[[], dict],
                 on_command: Callable[[str, dict, str], dict] | None = None,
                 config_path: str | None = None, log: logging.Logger | None = None,
                 state_dir: str | None = None,
                 on_event: Callable[[Event], None] | None = None):
        self.cfg = validate(MQTT_SECTION, _plain(mqtt), "mqtt")
        self.log = log or logging.getLogger("straind.feed")
        self.station_id = str(station_id)
        self.devices = tuple(devices)
        self.metadata = dict(metadata)
        self.status_provider = status_provider
        self.on_command = on_command
        self.on_event = on_event
        self.config_path = config_path
        self._state_dir = state_dir
        self.topics = FeedTopics(self.cfg["topic_prefix"], self.station_id)
        self.enabled = bool(self.cfg["enabled"])
        self.address = f"{self.cfg['host']}:{self.cfg['port']}"
        self._interval_ns = int(round(self.cfg["publish_interval_s"] * 1e9))
        self._idle_s = max(self.cfg["publish_interval_s"], 0.5)
        self._batch_age_s = max(min(self.cfg["publish_interval_s"], 1.0), 0.05)
        self._dtype = self.cfg["full_rate_dtype"]
        self._layout_crc = zlib.crc32(_dumps(self._devices_meta(with_topics=False)))
        self._states: dict[str, _DeviceState] = {}
        for dev in self.devices:
            self._states[dev.name] = _DeviceState(dev.name, dev, self._full_rate_for(dev.name))

        self._lock = threading.RLock()
        self._queue: collections.deque = collections.deque()
        self._events: collections.deque = collections.deque()
        self._net: collections.deque = collections.deque()
        self._acks: collections.deque = collections.deque()
        self._commands: collections.deque = collections.deque(maxlen=1000)
        self._wake = threading.Event()
        self._cmd_wake = threading.Event()
        self._stopping = threading.Event()
        self._thread: threading.Thread | None = None
        self._cmd_thread: threading.Thread | None = None
        self._client: _Client | None = None
        self._outbox: Outbox | None = None
        self._started = False
        self._stopped = False
        self._accepting = False
        self._stop_reason = "shutdown"
        self._stop_deadline = 0.0

        self._connected = False
        self._broker_state = "disabled" if not self.enabled else "not started"
        self._state_since_ns = time.time_ns()
        self._last_error: str | None = None
        self._outage_logged: set[str] = set()
        self._outage_start_mono: float | None = None
        self._ever_connected = False
        self._inflight: dict[int, Any] = {}      # mid -> outbox record number, or a _MemMsg
        self._counts = collections.Counter()
        self._next_status = 0.0
        self._provider_failed = False
        self._last_queue_drop_announce = 0.0
        self._queue_drops_unannounced = 0
        self._drops_unlogged = 0
        self._last_drop_log = -1e9
        self._rejected_logged: set[str] = set()
        self._started_ns = 0
        #: seconds between attempts to write to an outbox that failed
        self.outbox_retry_s = 1.0
        #: the outbox is tried again only with this much free space (plus the memory queue's
        #: bytes) on its file system, so that a disk with a few bytes free does not flap
        self.outbox_resume_free_bytes = 64 << 10
        self._ob_error: str | None = None        # set while the outbox cannot write
        self._ob_error_since_ns = 0
        self._ob_retry_at = 0.0
        self._mem: collections.deque[_MemMsg] = collections.deque()   # not yet handed out
        self._mem_bytes = 0
        self._mem_inflight = 0
        self.memory_max_bytes = 0                # set at start: a quarter of outbox.max_mb
        self._mem_kept = 0                       # messages kept in memory in this episode
        self._mem_drops_unannounced = 0
        self._last_mem_drop_announce = 0.0

        self._password: str | None = None
        if self.enabled:
            self._password = self._resolve_password()
            self._check_tls_files()

    # --------------------------------------------------------------------------- config bits
    def _full_rate_for(self, device: str) -> bool:
        fr = self.cfg["full_rate"]
        return bool(fr) if isinstance(fr, bool) else device in fr

    def _resolve_password(self) -> str | None:
        cfg = self.cfg
        if cfg["password_file"]:
            path = cfg["password_file"]
            try:
                with open(path, "r", encoding="utf-8") as fh:
                    text = fh.readline().rstrip("\r\n")
            except OSError as exc:
                raise ConfigError("mqtt.password_file", f"cannot read {path}: "
                                  f"{exc.strerror or exc}") from None
            if _readable_by_others(path):
                self.log.warning("mqtt.password_file %s is readable by other users; "
                                 "chmod 600 it", path)
            return text
        if cfg["password_env"]:
            name = cfg["password_env"]
            if name not in os.environ:
                raise ConfigError("mqtt.password_env", f"environment variable {name} is not set")
            return os.environ[name]
        if cfg["password"]:
            if self.config_path and _readable_by_others(self.config_path):
                self.log.warning("mqtt.password is written inline in %s, which other users "
                                 "can read; move it to mqtt.password_file (mode 0600) or "
                                 "mqtt.password_env", self.config_path)
            return cfg["password"]
        return None

    def _check_tls_files(self) -> None:
        tls = self.cfg["tls"]
        for key in ("ca_file", "cert_file", "key_file"):
            if tls[key] and not os.path.isfile(tls[key]):
                raise ConfigError(f"mqtt.tls.{key}", f"file not found: {tls[key]}")

    def _devices_meta(self, with_topics: bool = True) -> list[dict]:
        out = []
        for dev in self.devices:
            fr = self._full_rate_for(dev.name)
            d: dict[str, Any] = {
                "name": dev.name, "driver": dev.driver, "sample_rate_hz": dev.sample_rate_hz,
                "period_ns": dev.period_ns, "raw_dtype": dev.raw_dtype, "n_raw": dev.n_raw,
                "attrs": dict(dev.attrs),
                "channels": [{"name": c.name, "column": c.column, "quantity": c.quantity,
                              "unit": c.unit, "measured": c.measured, "attrs": dict(c.attrs)}
                             for c in dev.channels],
                "full_rate": fr,
            }
            if with_topics:
                for c, ch in zip(dev.channels, d["channels"]):
                    ch["topic"] = self.topics.values(dev.name, c.name)
                if fr:
                    d["full_rate_topic"] = self.topics.full(dev.name)
                    d["full_rate_dtype"] = self._dtype
                    d["full_rate_quality"] = self.cfg["full_rate_quality"]
            out.append(d)
        return out

    # ----------------------------------------------------------------------------- lifecycle
    def start(self) -> None:
        """Open the outbox, start the network thread and the feed thread."""
        if self._started or not self.enabled:
            self._started = True
            return
        self._started = True
        self._started_ns = time.time_ns()
        ob = self.cfg["outbox"]
        path = ob["path"]
        if not path:
            if not self._state_dir_default():
                raise ConfigError("mqtt.outbox.path", "no outbox directory: set mqtt.outbox.path")
            path = self._state_dir_default()
        self._outbox = Outbox(path, max_bytes=int(ob["max_mb"] * (1 << 20)),
                              sync_interval_s=ob["sync_interval_s"], log=self.log)
        self.memory_max_bytes = max(64 << 10, self._outbox.max_bytes // 4)
        if self._outbox.depth:
            self.log.info("MQTT outbox %s holds %d unsent message(s) from before; they go first",
                          path, self._outbox.depth)
        self._client = self._make_client()
        self._set_state("connecting")
        self._accepting = True
        self._thread = threading.Thread(target=self._run, name="straind-feed", daemon=True)
        self._thread.start()
        self._cmd_thread = threading.Thread(target=self._command_loop, name="straind-feed-cmd",
                                            daemon=True)
        self._cmd_thread.start()
        self._client.loop_start()

    def _state_dir_default(self) -> str | None:
        return os.path.join(self._state_dir, "mqtt-outbox") if self._state_dir else None

    def _make_client(self) -> _Client:
        cfg = self.cfg
        v5 = cfg["protocol"] == "5"
        client_id = cfg["client_id"] or f"straind-{self.station_id}"
        kwargs: dict[str, Any] = {"callback_api_version": CallbackAPIVersion.VERSION2,
                                  "client_id": client_id,
                                  "protocol": mqtt.MQTTv5 if v5 else mqtt.MQTTv311}
        if not v5:
            kwargs["clean_session"] = False
        client = _Client(**kwargs)
        client.straind_on_fail = self._on_connect_error
        client.reconnect_delay_set(cfg["reconnect_min_s"], cfg["reconnect_max_s"])
        client.max_inflight_messages_set(cfg["max_inflight"] + 16)
        client.will_set(self.topics.status, _dumps({"state": "offline",
                                                    "reason": "connection lost",
                                                    "station": self.station_id,
                                                    "last_will": True, "seq": None}),
                        qos=1, retain=True)
        if cfg["username"]:
            client.username_pw_set(cfg["username"], self._password)
        tls = cfg["tls"]
        if tls["enabled"]:
            client.tls_set(ca_certs=tls["ca_file"], certfile=tls["cert_file"],
                           keyfile=tls["key_file"], cert_reqs=ssl.CERT_REQUIRED,
                           tls_version=ssl.PROTOCOL_TLS_CLIENT)
            if not tls["verify_hostname"]:
                self.log.warning("mqtt.tls.verify_hostname is false: the broker certificate is "
                                 "checked against the CA but not against the host name %s",
                                 cfg["host"])
                client.tls_insecure_set(True)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_publish = self._on_publish
        client.on_message = self._on_message
        if v5:
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = cfg["session_expiry_s"]
            client.connect_async(cfg["host"], cfg["port"], cfg["keepalive_s"],
                                 clean_start=False, properties=props)
        else:
            client.connect_async(cfg["host"], cfg["port"], cfg["keepalive_s"])
        return client

    def stop(self, reason: str = "shutdown", timeout_s: float = 5.0) -> None:
        """Publish offline status, drain into the outbox (and to the broker while time allows),
        disconnect. Idempotent."""
        with self._lock:
            if self._stopped:
                return
            self._stopped = True
        self._accepting = False
        if self._thread is None:
            self._set_state("stopped" if self.enabled else "disabled")
            return
        self._stop_reason = str(reason)
        self._stop_deadline = time.monotonic() + max(0.0, float(timeout_s))
        self._stopping.set()
        self._wake.set()
        self._thread.join(timeout_s + 10.0)
        self._cmd_wake.set()
        if self._cmd_thread is not None:
            self._cmd_thread.join(2.0)

    # ------------------------------------------------------------------------- hot path (API)
    def submit(self, block: EngineeringBlock) -> bool:
        """Queue a block for the feed (O(block) numpy). False if not taken (queue full / stopped)."""
        if not self.enabled:
            return True
        if not self._accepting:
            return False
        raw = block.raw
        if raw.t0_ns is None:
            self._counts["untimed_blocks"] += 1
            return False
        if len(self._queue) >= self.cfg["queue_blocks"]:
            self._counts["dropped_queue"] += 1
            self._queue_drops_unannounced += 1
            return False
        parts = summarise(block.values, block.quality, raw.t0_ns, raw.period_ns, self._interval_ns)
        state = self._states.get(block.device)
        full = self._full_rate_for(block.device) if state is None else state.full_rate
        self._queue.append((block.device, parts, block if full else None, block.names,
                            block.units, time.monotonic()))
        self._wake.set()
        return True

    def record_event(self, event: Event) -> None:
        """Publish an event on the events topic (QoS 1, through the outbox)."""
        if not self.enabled or self._stopped and self._thread is None:
            return
        self._events.append(event)
        self._wake.set()

    def set_metadata(self, metadata: Mapping[str, Any]) -> None:
        """Replace the metadata (after a tare or calibration change) and republish it."""
        self.metadata = dict(metadata)
        self._net.append(("republish_meta",))
        self._wake.set()

    # --------------------------------------------------------------------------- status (API)
    def status(self) -> dict:
        """Broker state, outbox depth/bytes, oldest unsent age, drops and published counts."""
        ob = self._outbox.stats() if self._outbox is not None else None
        if ob is not None:
            ob["state"] = "unwritable" if self._ob_error else "ok"
            ob["error"] = self._ob_error
            ob["unwritable_since"] = iso_utc(self._ob_error_since_ns) if self._ob_error else None
            ob["memory"] = {"depth": len(self._mem) + self._mem_inflight,
                            "unsent": len(self._mem), "bytes": self._mem_bytes,
                            "max_bytes": self.memory_max_bytes,
                            "dropped": self._counts["dropped_memory"]}
        c = self._counts
        return {
            "enabled": self.enabled,
            "broker": self._broker_state,
            "broker_address": self.address,
            "connected": self._connected,
            "since": iso_utc(self._state_since_ns),
            "last_error": self._last_error,
            "outbox": ob,
            "oldest_unsent_age_s": ob["oldest_unsent_age_s"] if ob else None,
            "queue_depth": len(self._queue),
            "queue_max": self.cfg["queue_blocks"],
            "dropped": {"queue_full": c["dropped_queue"],
                        "outbox_full": ob["dropped"] if ob else 0,
                        "memory_full": c["dropped_memory"],
                        "qos0_offline": c["dropped_qos0"], "rejected": c["rejected"],
                        "untimed": c["untimed_blocks"]},
            "published": {"values": c["values"], "full_rate": c["full_rate"],
                          "events": c["events"], "status": c["status"], "meta": c["meta"],
                          "replies": c["replies"]},
            "delivered": c["delivered"],
            "in_flight": len(self._inflight),
            "commands": {"enabled": self.cfg["commands"]["enabled"], "handled": c["cmd_ok"],
                         "failed": c["cmd_error"], "ignored": c["cmd_ignored"]},
        }

    # --------------------------------------------------------------------- paho callbacks
    # (paho's network thread: record and wake the feed thread; no locks shared with publish)
    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        if reason_code.is_failure:
            self._net.append(("refused", str(reason_code)))
        else:
            self._net.append(("connected", bool(flags.session_present)))
        self._wake.set()

    def _on_disconnect(self, client, userdata, flags, reason_code, properties) -> None:
        self._connected = False
        self._net.append(("disconnected", str(reason_code)))
        self._wake.set()

    def _on_publish(self, client, userdata, mid, reason_code, properties) -> None:
        self._acks.append((mid, reason_code.is_failure, str(reason_code)))
        self._wake.set()

    def _on_connect_error(self, exc: BaseException) -> None:
        self._net.append(("error", exc))
        self._wake.set()

    def _on_message(self, client, userdata, message) -> None:
        if message.topic == self.topics.cmd:
            self._commands.append(message)
            self._cmd_wake.set()

    # -------------------------------------------------------------------------- feed thread
    def _run(self) -> None:
        failures: set[str] = set()
        try:
            while True:
                if not self._queue:          # with a backlog, the next step starts at once
                    self._wake.wait(0.05)
                self._wake.clear()
                try:
                    self._step()
                except Exception as exc:  # e.g. outbox disk full: report, keep going
                    key = f"{type(exc).__name__}: {exc}"
                    if key not in failures:
                        failures.add(key)
                        self.log.exception("MQTT feed step failed (%s); retrying", key)
                    self._last_error = key
                    self._stopping.wait(0.5)
                if self._stopping.is_set():
                    break
        finally:
            self._shutdown()

    def _step(self) -> None:
        self._handle_net()
        self._handle_acks()
        self._pump()                # what is stored already goes out before new work is taken
        self._handle_inputs()
        self._handle_acks()
        now = time.monotonic()
        self._timers(now)
        if self._ob_error and now >= self._ob_retry_at:
            self._try_outbox()
        self._announce_drops()
        self._outbox.flush()
        self._pump()
        self._outbox.maybe_sync()

    def _set_state(self, state: str, error: str | None = None) -> None:
        if state != self._broker_state:
            self._state_since_ns = time.time_ns()
        self._broker_state = state
        if error is not None:
            self._last_error = error

    def _log_once(self, key: str, level: int, msg: str, *args: Any) -> None:
        """Log a connection problem once per outage (not once per retry)."""
        if key in self._outage_logged:
            self.log.debug(msg, *args)
            return
        self._outage_logged.add(key)
        self.log.log(level, msg, *args)

    def _handle_net(self) -> None:
        while self._net:
            ev = self._net.popleft()
            kind = ev[0]
            if kind == "connected":
                outage = None
                if self._outage_start_mono is not None:
                    outage = time.monotonic() - self._outage_start_mono
                self._connected = True
                self._outage_logged.clear()
                self._outage_start_mono = None
                self._set_state("connected")
                self._last_error = None
                depth = self._outbox.depth
                if outage is not None and self._ever_connected:
                    self.log.info("MQTT broker at %s reachable again after %.1f s; sending %d "
                                  "queued message(s)", self.address, outage, depth)
                elif outage is not None:
                    self.log.info("connected to MQTT broker at %s after %.1f s; sending %d "
                                  "queued message(s)", self.address, outage, depth)
                else:
                    self.log.info("connected to MQTT broker at %s", self.address)
                self._ever_connected = True
                self._on_connected()
            elif kind == "refused":
                self._mark_outage()
                reason = ev[1]
                self._set_state("refused", f"broker refused the connection: {reason}")
                hint = ""
                low = reason.lower()
                if "password" in low or "authori" in low:
                    hint = " (check mqtt.username and the password)"
                self._log_once("refused:" + reason, logging.ERROR,
                               "MQTT broker at %s refused the connection: %s%s; data are kept in "
                               "the outbox", self.address, reason, hint)
            elif kind == "disconnected":
                was = self._broker_state
                self._connected = False
                self._mark_outage()
                if was == "connected" and not self._stopping.is_set():
                    self._set_state("disconnected", f"connection lost: {ev[1]}")
                    self._log_once("lost", logging.WARNING,
                                   "connection to MQTT broker at %s lost (%s); data are kept in "
                                   "the outbox and sent on reconnect", self.address, ev[1])
            elif kind == "error":
                self._mark_outage()
                exc = ev[1]
                if isinstance(exc, ssl.SSLCertVerificationError):
                    msg = (f"TLS certificate check of broker at {self.address} failed "
                           f"(certificate verify failed: {exc.verify_message or exc}); check "
                           f"mqtt.tls.ca_file and that the certificate names host "
                           f"{self.cfg['host']!r}")
                    self._set_state("tls_error", msg)
                    self._log_once("tls", logging.ERROR, "%s", msg)
                elif isinstance(exc, ssl.SSLError):
                    msg = f"TLS handshake with broker at {self.address} failed: {exc}"
                    self._set_state("tls_error", msg)
                    self._log_once("tls", logging.ERROR, "%s", msg)
                else:
                    reason = getattr(exc, "strerror", None) or str(exc) or type(exc).__name__
                    msg = f"MQTT broker at {self.address} is unreachable ({reason})"
                    self._set_state("unreachable", msg)
                    self._log_once("unreachable", logging.WARNING,
                                   "%s; the service keeps running, data go to the outbox at %s "
                                   "and are sent when it answers (retrying with backoff up to "
                                   "%g s)", msg, self._outbox.path, self.cfg["reconnect_max_s"])
            elif kind == "republish_meta":
                if self._connected:
                    self._publish_meta()

    def _mark_outage(self) -> None:
        if self._outage_start_mono is None:
            self._outage_start_mono = time.monotonic()

    def _on_connected(self) -> None:
        client = self._client
        client.subscribe(self.topics.cmd, qos=0)
        self._publish_meta()
        self._publish_status("online", "running")

    def _handle_inputs(self, drain: bool = False) -> None:
        """Turn submitted blocks into value messages and batches: INPUTS_PER_STEP of them, or
        all with `drain` (at shutdown)."""
        while self._events:
            self._emit_event(self._events.popleft())
        q = self._queue
        # a bounded share per step, so sending (the pump) gets its turn between them: under a
        # backlog, taking the whole queue first would hold every batch back until it is empty
        for _ in range(len(q) if drain else INPUTS_PER_STEP):
            if not q:
                break
            device, parts, block, names, units, mono = q.popleft()
            st = self._states.get(device)
            if st is None:
                st = self._states[device] = _DeviceState(device, None, self._full_rate_for(device))
            if names != st.names and st.acc is not None:
                self._emit_values(st)
                if st.batch:
                    self._emit_batch(st, st.batch_rows)
            st.names, st.units = names, units
            st.last_input_mono = mono
            for part in parts:
                if st.acc is None:
                    st.acc = part
                elif part.index == st.acc.index:
                    st.acc_more.append(part)
                    if len(st.acc_more) >= MERGE_EVERY:
                        st.acc = merge_stats([st.acc, *st.acc_more])
                        st.acc_more = []
                else:
                    self._emit_values(st)
                    st.acc = part
            if block is not None:
                self._add_to_batch(st, block, mono)

    def _timers(self, now: float) -> None:
        for st in self._states.values():
            if st.acc is not None and now - st.last_input_mono > self._idle_s:
                self._emit_values(st)
            if st.batch and now - st.batch_first_mono > self._batch_age_s:
                self._emit_batch(st, st.batch_rows)
        if self._connected and now >= self._next_status:
            self._publish_status("online", "running")

    def _handle_acks(self) -> None:
        acks = self._acks
        while acks:
            mid, failed, reason = acks.popleft()
            rec = self._inflight.pop(mid, None)
            if rec is None:
                continue
            if failed:
                self._counts["rejected"] += 1
                self._log_once_rejected(reason)
            else:
                self._counts["delivered"] += 1
            if isinstance(rec, _MemMsg):
                self._mem_inflight -= 1
            else:
                self._outbox.ack(rec)

    def _log_once_rejected(self, reason: str) -> None:
        if reason not in self._rejected_logged:
            self._rejected_logged.add(reason)
            self.log.error("MQTT broker at %s rejected a message (%s); it is counted as "
                           "rejected and not retried", self.address, reason)

    def _pump(self) -> None:
        if not self._connected:
            return
        limit = self.cfg["max_inflight"]
        client = self._client
        while len(self._inflight) < limit:
            rec = self._outbox.next_unsent()
            if rec is None:
                if not self._mem:
                    return
                # the outbox holds only older messages than memory: memory comes after it
                m = self._mem.popleft()
                self._mem_bytes -= m.size
                try:
                    info = client.publish(m.topic, m.payload, qos=1, retain=m.retain)
                except ValueError as exc:
                    self.log.error("MQTT message on %s cannot be sent (%s); dropped", m.topic,
                                   exc)
                    self._counts["rejected"] += 1
                    continue
                self._inflight[info.mid] = m
                self._mem_inflight += 1
                if info.rc == MQTTErrorCode.MQTT_ERR_NO_CONN:
                    return
                continue
            try:
                info = client.publish(rec.topic, rec.payload, qos=rec.qos, retain=rec.retain)
            except ValueError as exc:   # payload or topic paho refuses: can never be sent
                self.log.error("MQTT message on %s cannot be sent (%s); dropped", rec.topic, exc)
                self._counts["rejected"] += 1
                self._outbox.ack(rec.rec)
                continue
            self._inflight[info.mid] = rec.rec
            if info.rc == MQTTErrorCode.MQTT_ERR_NO_CONN:
                return  # paho keeps it and sends it on reconnect

    def _announce_drops(self) -> None:
        now = time.monotonic()
        for drop in self._outbox.take_drops():
            self._drops_unlogged += drop.count
            if now - self._last_drop_log > 60.0:
                self.log.warning("MQTT outbox %s full (%g MiB): %d oldest unsent message(s) "
                                 "dropped (%d in all); they are announced on %s",
                                 self._outbox.path, self.cfg["outbox"]["max_mb"],
                                 self._drops_unlogged, self._outbox.dropped, self.topics.events)
                self._drops_unlogged = 0
                self._last_drop_log = now
            self._feed_event("feed_drop", reason="outbox full", dropped=drop.count,
                             first_record=drop.first_rec, last_record=drop.last_rec,
                             total_dropped=self._outbox.dropped,
                             max_mb=self.cfg["outbox"]["max_mb"])
        if self._mem_drops_unannounced and now - self._last_mem_drop_announce > 5.0:
            n, self._mem_drops_unannounced = self._mem_drops_unannounced, 0
            self._last_mem_drop_announce = now
            self.log.warning("MQTT outbox unwritable and memory queue full (%d bytes): %d "
                             "oldest message(s) dropped", self.memory_max_bytes, n)
            self._feed_event("feed_drop", reason="outbox unwritable, memory queue full",
                             dropped=n, total_dropped=self._counts["dropped_memory"],
                             memory_max_bytes=self.memory_max_bytes)
        if self._queue_drops_unannounced and now - self._last_queue_drop_announce > 5.0:
            n, self._queue_drops_unannounced = self._queue_drops_unannounced, 0
            self._last_queue_drop_announce = now
            self.log.warning("MQTT feed queue full: %d block(s) not published", n)
            self._feed_event("feed_drop", reason="feed queue full", dropped_blocks=n,
                             total_dropped_blocks=self._counts["dropped_queue"])

    def _feed_event(self, kind: str, **detail: Any) -> None:
        event = make_event(kind, origin="service", **detail)
        self._emit_event(event)
        if self.on_event is not None:
            try:
                self.on_event(event)
            except Exception:  # pragma: no cover - the service's callback
                self.log.exception("on_event callback failed")

    # ------------------------------------------------------------------------ message makers
    def _emit_event(self, event: Event) -> None:
        topic = self.topics.events
        doc = {"station": self.station_id, "time": iso_utc(event.time_ns), **event.as_dict()}
        self._store(topic, lambda seq: _dumps({"seq": seq, **doc}), False)
        self._counts["events"] += 1

    # ------------------------------------------------------------- outbox or memory fallback
    def _store(self, topic: str, make: Callable[[int], bytes], retain: bool) -> None:
        """Queue a QoS 1 message: in the outbox, or in memory while the outbox cannot write."""
        if self._ob_error and not self._mem and time.monotonic() >= self._ob_retry_at:
            # retry with this very message, so that "recovered" means records are taken
            if self._try_outbox((topic, make, retain)):
                return
        if not self._ob_error:
            try:
                self._outbox.append(topic, make, qos=1, retain=retain)
                return
            except OSError as exc:
                self._outbox_failed(exc)
        self._keep_in_memory(topic, make, retain)

    def _keep_in_memory(self, topic: str, make: Callable[[int], bytes], retain: bool) -> None:
        seq = self._outbox.take_seq(topic)
        msg = _MemMsg(topic, bytes(make(seq)), bool(retain), seq, time.time_ns())
        self._mem.append(msg)
        self._mem_bytes += msg.size
        self._mem_kept += 1
        while self._mem_bytes > self.memory_max_bytes and len(self._mem) > 1:
            old = self._mem.popleft()
            self._mem_bytes -= old.size
            self._counts["dropped_memory"] += 1
            self._mem_drops_unannounced += 1

    def _outbox_failed(self, exc: OSError) -> None:
        """The outbox did not take a message: switch to the memory queue, announce once."""
        self._ob_retry_at = time.monotonic() + self.outbox_retry_s
        if self._ob_error:
            return
        reason = getattr(exc, "strerror", None) or str(exc)
        self._ob_error = f"{type(exc).__name__}: {reason}"
        self._ob_error_since_ns = time.time_ns()
        self._mem_kept = 0
        self.log.error("MQTT outbox %s cannot write (%s); QoS 1 messages are kept in memory "
                       "(at most %d bytes) and published from there until it can",
                       self._outbox.path, reason, self.memory_max_bytes)
        self._feed_event("outbox_unwritable", path=self._outbox.path, error=reason,
                         errno=getattr(exc, "errno", None),
                         memory_max_bytes=self.memory_max_bytes)

    def _try_outbox(self, new: tuple[str, Callable[[int], bytes], bool] | None = None) -> bool:
        """Try the failed outbox again: persist its state, move the memory queue into it in
        order, then store `new`. True when it took everything (the feed uses it again)."""
        self._ob_retry_at = time.monotonic() + self.outbox_retry_s
        ob = self._outbox
        try:
            free = shutil.disk_usage(ob.path).free
        except OSError:
            free = None
        if free is not None and free < self.outbox_resume_free_bytes + self._mem_bytes:
            return False
        try:
            ob.check_writable()
            while self._mem:
                m = self._mem[0]
                ob.append(m.topic, m.payload, qos=1, retain=m.retain, seq=m.seq,
                          time_ns=m.time_ns)
                self._mem.popleft()
                self._mem_bytes -= m.size
            if new is not None:
                ob.append(new[0], new[1], qos=1, retain=new[2])
        except OSError:
            return False
        error, self._ob_error = self._ob_error, None
        lasted_s = (time.time_ns() - self._ob_error_since_ns) / 1e9
        self.log.warning("MQTT outbox %s writes again after %.1f s; %d message(s) were kept "
                         "in memory meanwhile", ob.path, lasted_s, self._mem_kept)
        self._feed_event("outbox_recovered", path=ob.path, previous_error=error,
                         unwritable_s=round(lasted_s, 3), kept_in_memory=self._mem_kept,
                         dropped=self._counts["dropped_memory"])
        return True

    def _emit_values(self, st: _DeviceState) -> None:
        acc, st.acc = st.acc, None
        more, st.acc_more = st.acc_more, []
        if acc is None:
            return
        if more:
            acc = merge_stats([acc, *more])
        start_ns = acc.index * self._interval_ns
        end_ns = start_ns + self._interval_ns
        layout = {c.name: c for c in st.layout.channels} if st.layout else {}
        qos = self.cfg["qos"]
        retain = self.cfg["retain_values"]
        count = acc.count.tolist()
        total = acc.total.tolist()
        vmin, vmax = acc.vmin.tolist(), acc.vmax.tolist()
        last, last_ns = acc.last.tolist(), acc.last_ns.tolist()
        unusable, flags = acc.unusable.tolist(), acc.flags.tolist()
        for j, name in enumerate(st.names):
            ch = layout.get(name)
            n = count[j]
            bits = int(flags[j])
            quality = "bad" if n == 0 else ("good" if not bits and not unusable[j] else "uncertain")
            doc = {"station": self.station_id, "device": st.name, "channel": name,
                   "time": iso_utc(end_ns), "time_ns": end_ns, "start_ns": start_ns,
                   "interval_s": self.cfg["publish_interval_s"],
                   "quantity": ch.quantity if ch else "",
                   "unit": st.units[j] if j < len(st.units) else (ch.unit if ch else ""),
                   "quality": quality, "quality_bits": bits, "flags": _flag_names(bits),
                   "count": n, "unusable": int(unusable[j]),
                   "mean": total[j] / n if n else None,
                   "min": vmin[j] if n else None, "max": vmax[j] if n else None,
                   "last": last[j] if n else None,
                   "last_ns": int(last_ns[j]) if n else None}
            self._send_data(self.topics.values(st.name, name),
                            lambda seq, doc=doc: _dumps({"seq": seq, **doc}), qos, retain)
            self._counts["values"] += 1

    def _send_data(self, topic: str, make: Callable[[int], bytes], qos: int, retain: bool) -> None:
        if qos >= 1:
            self._store(topic, make, retain)
            return
        seq = self._outbox.allocate_seq(topic)
        if not self._connected:
            self._counts["dropped_qos0"] += 1
            return
        self._client.publish(topic, make(seq), qos=0, retain=retain)

    def _add_to_batch(self, st: _DeviceState, block: EngineeringBlock, mono: float) -> None:
        raw = block.raw
        n = raw.n_samples
        if n == 0:
            return
        if st.batch:
            contiguous = (raw.start_index == st.batch_next_index
                          and raw.period_ns == st.batch_period_ns
                          and abs(raw.t0_ns - st.batch_next_t_ns) < max(raw.period_ns // 2, 1)
                          and block.values.shape[1] == st.batch[0][0].shape[1])
            if not contiguous:
                self._emit_batch(st, st.batch_rows)
        if not st.batch:
            st.batch = []
            st.batch_rows = 0
            st.batch_period_ns = raw.period_ns
            st.batch_first_mono = mono
        st.batch.append((block.values, block.quality, raw.start_index, raw.t0_ns))
        st.batch_rows += n
        st.batch_next_index = raw.start_index + n
        st.batch_next_t_ns = raw.t0_ns + n * raw.period_ns
        size = self.cfg["batch_samples"]
        if size == 0:
            self._emit_batch(st, st.batch_rows)
        else:
            while st.batch_rows >= size:
                self._emit_batch(st, size)

    def _emit_batch(self, st: _DeviceState, rows: int) -> None:
        """Publish the first `rows` rows of the device's pending full-rate samples."""
        parts = st.batch
        if not parts or rows <= 0:
            return
        period = st.batch_period_ns
        start_index, t0 = parts[0][2], parts[0][3]
        if len(parts) == 1 and parts[0][0].shape[0] == rows:
            values, quality = parts[0][0], parts[0][1]
            rest = []
        else:
            values = np.concatenate([p[0] for p in parts])
            quality = np.concatenate([p[1] for p in parts])
            rest = []
            if values.shape[0] > rows:
                rest = [(values[rows:], quality[rows:], start_index + rows, t0 + rows * period)]
            values, quality = values[:rows], quality[:rows]
        st.batch = rest
        st.batch_rows = rest[0][0].shape[0] if rest else 0
        if rest:
            st.batch_first_mono = time.monotonic()
        q = quality if self.cfg["full_rate_quality"] else None
        crc = self._layout_crc
        dtype = self._dtype
        self._send_data(self.topics.full(st.name),
                        lambda seq: encode_batch(seq, t0, period, start_index, values, q, dtype,
                                                 crc),
                        self.cfg["qos"], False)
        self._counts["full_rate"] += 1

    def _publish_direct(self, topic: str, doc: dict, retain: bool, qos: int = 1,
                        properties: Properties | None = None):
        seq = self._outbox.allocate_seq(topic)
        return self._client.publish(topic, _dumps({"seq": seq, **doc}), qos=qos, retain=retain,
                                    properties=properties)

    def _publish_meta(self) -> None:
        doc = {"station": self.station_id, "time": iso_utc(time.time_ns()),
               "time_ns": time.time_ns(), "layout_crc": self._layout_crc,
               "publish_interval_s": self.cfg["publish_interval_s"], "qos": self.cfg["qos"],
               "topics": self.topics.as_dict(), "metadata": self.metadata,
               "devices": self._devices_meta(),
               "full_rate_format": {"magic": BATCH_MAGIC.decode(), "version": BATCH_VERSION,
                                    "header_bytes": BATCH_HEADER.size, "byte_order": "little"}}
        self._publish_direct(self.topics.meta, doc, retain=True)
        self._counts["meta"] += 1

    def _health(self) -> dict:
        health: dict[str, Any] = {}
        try:
            provided = self.status_provider() if self.status_provider else {}
            health.update(provided or {})
            self._provider_failed = False
        except Exception as exc:
            if not self._provider_failed:
                self.log.warning("status provider failed: %s", exc)
            self._provider_failed = True
            health["status_provider_error"] = str(exc)
        feed = self.status()
        try:
            feed["outbox_disk_free_bytes"] = shutil.disk_usage(self._outbox.path).free
        except OSError:
            feed["outbox_disk_free_bytes"] = None
        health["feed"] = feed
        return health

    def _publish_status(self, state: str, reason: str):
        self._next_status = time.monotonic() + self.cfg["status_interval_s"]
        now = time.time_ns()
        doc = {"state": state, "reason": reason, "station": self.station_id,
               "time": iso_utc(now), "time_ns": now, "started": iso_utc(self._started_ns),
               "health": self._health()}
        self._counts["status"] += 1
        return self._publish_direct(self.topics.status, doc, retain=True)

    # ------------------------------------------------------------------------------ shutdown
    def _shutdown(self) -> None:
        client = self._client
        try:
            self._accepting = False
            self._handle_net()
            self._handle_inputs(drain=True)
            for st in self._states.values():
                self._emit_values(st)
                if st.batch:
                    self._emit_batch(st, st.batch_rows)
            self._announce_drops()
            self._outbox.flush()
            reserve = 0.5
            while self._connected and (self._outbox.depth > 0 or self._mem
                                       or self._mem_inflight) and \
                    time.monotonic() < self._stop_deadline - reserve:
                self._handle_net()
                self._handle_acks()
                self._pump()
                self._wake.wait(0.01)
                self._wake.clear()
            self._handle_acks()
            if self._connected:
                try:
                    info = self._publish_status("offline", self._stop_reason)
                    info.wait_for_publish(max(0.05, min(reserve, self._stop_deadline
                                                        - time.monotonic())))
                except (RuntimeError, ValueError):
                    pass
                self._handle_acks()
            self._spill_memory()
            left = self._outbox.depth
            if left:
                self.log.info("MQTT feed stopped with %d message(s) in the outbox %s; they are "
                              "sent after the next start", left, self._outbox.path)
        except Exception:
            self.log.exception("MQTT feed shutdown failed")
        finally:
            try:
                client.disconnect()
            except Exception:  # pragma: no cover
                pass
            client.loop_stop()
            self._connected = False
            self._outbox.close()
            self._set_state("stopped")

    def _spill_memory(self) -> None:
        """At shutdown: messages still in memory (unacknowledged) go to the outbox if it takes
        them now, so the next start sends them; otherwise they are lost, logged."""
        pending = [m for m in self._inflight.values() if isinstance(m, _MemMsg)] + list(self._mem)
        if not pending:
            return
        self._mem = collections.deque(pending)
        self._mem_bytes = sum(m.size for m in pending)
        if self._ob_error is None or self._try_outbox():
            if self._mem:   # the outbox worked all along: plain appends
                try:
                    while self._mem:
                        m = self._mem[0]
                        self._outbox.append(m.topic, m.payload, qos=1, retain=m.retain,
                                            seq=m.seq, time_ns=m.time_ns)
                        self._mem.popleft()
                except OSError:
                    pass
        if self._mem:
            self.log.error("MQTT feed stopped with %d message(s) only in memory (outbox %s "
                           "unwritable): they are lost", len(self._mem), self._outbox.path)

    # ------------------------------------------------------------------------------ commands
    def _command_loop(self) -> None:
        ignored_every = self.cfg["commands"]["log_ignored_every"]
        while not (self._stopping.is_set() and not self._commands):
            self._cmd_wake.wait(0.2)
            self._cmd_wake.clear()
            while self._commands:
                msg = self._commands.popleft()
                if not self.cfg["commands"]["enabled"]:
                    self._counts["cmd_ignored"] += 1
                    n = self._counts["cmd_ignored"]
                    if n == 1 or n % ignored_every == 0:
                        self.log.warning("ignored MQTT command message on %s (%d so far): remote "
                                         "commands are disabled (mqtt.commands.enabled)",
                                         msg.topic, n)
                    continue
                try:
                    self._handle_command(msg)
                except Exception:  # pragma: no cover - keep the service going
                    self.log.exception("MQTT command handling failed")

    def _handle_command(self, msg: mqtt.MQTTMessage) -> None:
        props = getattr(msg, "properties", None)
        response_topic = getattr(props, "ResponseTopic", None) if props is not None else None
        corr_data = getattr(props, "CorrelationData", None) if props is not None else None
        corr: Any = None
        name: str | None = None
        try:
            if msg.retain:
                raise CommandError("retained command messages are not acted on")
            try:
                doc = json.loads(msg.payload.decode("utf-8"))
            except (UnicodeDecodeError, ValueError) as exc:
                raise CommandError(f"payload is not JSON: {exc}") from None
            if not isinstance(doc, dict):
                raise CommandError("payload must be a JSON object")
            corr = doc.get("correlation_id")
            name = doc.get("command")
            args = doc.get("args", {})
            if args is None:
                args = {}
            if not isinstance(name, str) or not name:
                raise CommandError('missing "command" (a non-empty string)')
            if not isinstance(args, dict):
                raise CommandError('"args" must be a JSON object')
            allow = self.cfg["commands"]["allow"]
            if allow and name not in allow:
                raise CommandError(f"command {name!r} is not allowed here (allowed: "
                                   f"{', '.join(allow)})")
            if self.on_command is None:
                raise CommandError("this service takes no remote commands")
            result = self.on_command(name, args, "mqtt")
            reply = {"ok": True, "result": result if result is not None else {}}
            self._counts["cmd_ok"] += 1
        except Exception as exc:
            if _is_command_error(exc):
                reply = {"ok": False, "error": str(exc)}
            else:
                self.log.exception("MQTT command %r failed", name)
                reply = {"ok": False, "error": f"internal error: {type(exc).__name__}: {exc}"}
            self._counts["cmd_error"] += 1
            self.log.info("MQTT command %r refused: %s", name, reply["error"])
        doc = {"correlation_id": corr, "command": name, "station": self.station_id,
               "time_ns": time.time_ns(), **reply}
        properties = None
        if self.cfg["protocol"] == "5" and corr_data is not None:
            properties = Properties(PacketTypes.PUBLISH)
            properties.CorrelationData = corr_data
        topic = response_topic or self.topics.reply
        try:
            seq = self._outbox.allocate_seq(self.topics.reply)
        except ValueError:   # outbox closed: the feed is stopping
            return
        self._client.publish(topic, _dumps({"seq": seq, **doc}), qos=1, retain=False,
                             properties=properties)
        self._counts["replies"] += 1


def _plain(node: Any) -> Any:
    """Plain dicts and lists (validated configs may be LineDicts); copies."""
    if isinstance(node, Mapping):
        return {k: _plain(v) for k, v in node.items()}
    if isinstance(node, (list, tuple)):
        return [_plain(v) for v in node]
    return node
