"""The driver contract: what every instrument plugin must do, and the errors it may raise.

A driver turns one instrument into a stream of `Block`s of raw values. It never converts to
engineering units: that is the channel chain's job, so that raw values are always what is stored.

Contract (checked by tests/test_driver_contract.py for every registered driver):

* ``__init__(setup, options)`` only stores its validated arguments; it touches no hardware.
* ``open()`` connects; a missing device raises `DriverIOError` (the supervisor retries).
* ``read_block(timeout_s)`` returns the next `Block` of ``setup.block_samples`` rows, or
  ``None`` if none is ready within ``timeout_s`` seconds. A block may be shorter at the end of a
  finite source, just before a gap in the sample counter (a block never spans lost samples) and
  just before a fault;
  a vanished device or unrecoverable stream raises `DriverIOError`; a finite source that is
  exhausted raises `EndOfStream`.
* ``close()`` releases everything and may be called any number of times, even if ``open()``
  failed half way.
* ``describe()`` returns a `DriverInfo` and works before ``open()``.

Drivers declare their options with `straind.schema` specs in ``OPTIONS`` (device level,
``devices[].options``) and ``CHANNEL_OPTIONS`` (``devices[].channels[].options``); unknown keys
are rejected by the validator before the driver is constructed.
"""

from __future__ import annotations

import abc
import collections
import time
from dataclasses import dataclass, field
from typing import Any, ClassVar, Mapping

from straind.block import Block
from straind.schema import ConfigError, Section

__all__ = [
    "Driver",
    "DriverInfo",
    "DeviceSetup",
    "ChannelSetup",
    "DriverError",
    "DriverConfigError",
    "DriverIOError",
    "DriverUnavailable",
    "EndOfStream",
    "NotSupported",
    "DriverEvent",
]


class DriverError(Exception):
    """Base of every error a driver raises."""


class DriverConfigError(DriverError, ConfigError):
    """The configuration cannot work with this driver: fail at start, naming the key."""

    def __init__(self, path: str, message: str, line: int | None = None):
        ConfigError.__init__(self, path, message, line)


class DriverIOError(DriverError):
    """A recoverable fault (device gone, timeout, bad stream): the supervisor reopens the driver."""


class EndOfStream(DriverError):
    """A finite source (such as a replay) has delivered all of its data."""


class DriverUnavailable(DriverError):
    """The plugin is registered but cannot be imported or constructed here."""


class NotSupported(DriverError):
    """The driver does not offer this optional capability (for example shunt switching)."""


@dataclass(frozen=True)
class ChannelSetup:
    """One configured channel as the driver sees it.

    index:   column in the device's blocks (configuration order).
    config:  the channel's whole validated configuration (sensor, bridge, resistances ...);
             a simulator may use it as the physical truth, a real driver usually ignores it.
    options: the validated ``channels[].options`` for this driver.
    """

    name: str
    index: int
    config: Mapping[str, Any]
    options: Mapping[str, Any]


@dataclass(frozen=True)
class DeviceSetup:
    """The device-level settings every driver receives."""

    name: str
    sample_rate_hz: float
    block_samples: int
    channels: tuple[ChannelSetup, ...]
    config: Mapping[str, Any] = field(default_factory=dict)

    @property
    def period_ns(self) -> int:
        return int(round(1e9 / self.sample_rate_hz))


@dataclass(frozen=True)
class DriverInfo:
    """What a driver says about itself (``straind drivers`` and the HDF5 attributes show it).

    native:      "code24" for signed 24-bit converter codes (int32 blocks), "float" otherwise.
    native_unit: unit of float blocks ("V/V", "ohm", ...); empty for codes.
    """

    summary: str
    max_channels: int
    min_rate_hz: float
    max_rate_hz: float
    native: str = "code24"
    native_unit: str = ""
    can_shunt: bool = False
    can_switch_excitation: bool = False
    details: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class DriverEvent:
    """Something a driver wants recorded in the events table (resync, CRC errors, lost frames)."""

    kind: str
    detail: Mapping[str, Any]
    wall_ns: int


class Driver(abc.ABC):
    """Abstract base of every instrument plugin. Subclasses set the class attributes below."""

    #: one-line description shown by ``straind drivers``
    summary: ClassVar[str] = ""
    #: schema of ``devices[].options``
    OPTIONS: ClassVar[Section] = Section({})
    #: schema of ``devices[].channels[].options``
    CHANNEL_OPTIONS: ClassVar[Section] = Section({})

    def __init__(self, setup: DeviceSetup, options: Mapping[str, Any]):
        self.setup = setup
        self.options = dict(options)
        self._events: collections.deque[DriverEvent] = collections.deque(maxlen=10_000)
        self.counters: dict[str, int] = {}

    # -- validation, before construction ---------------------------------------------------
    @classmethod
    def check_setup(cls, setup: DeviceSetup, options: Mapping[str, Any], path: str) -> None:
        """Reject a device setup this driver cannot serve (too many channels, rate out of range).

        `path` is the device's key path (``devices[0]``) for the error message. Subclasses may
        extend this; call super() first.
        """
        info = cls.static_info(options)
        if len(setup.channels) > info.max_channels:
            raise DriverConfigError(f"{path}.channels",
                                    f"driver takes at most {info.max_channels} channels, "
                                    f"got {len(setup.channels)}")
        if not info.min_rate_hz <= setup.sample_rate_hz <= info.max_rate_hz:
            raise DriverConfigError(f"{path}.sample_rate_hz",
                                    f"driver supports {info.min_rate_hz:g} to {info.max_rate_hz:g} Hz, "
                                    f"got {setup.sample_rate_hz:g}")

    @classmethod
    @abc.abstractmethod
    def static_info(cls, options: Mapping[str, Any]) -> DriverInfo:
        """Describe the driver from its options alone (no hardware access)."""

    # -- the contract ----------------------------------------------------------------------
    @abc.abstractmethod
    def open(self) -> None:
        """Connect to the instrument and start streaming."""

    @abc.abstractmethod
    def read_block(self, timeout_s: float) -> Block | None:
        """Next block, or None if none is ready within `timeout_s` seconds."""

    @abc.abstractmethod
    def close(self) -> None:
        """Stop and release everything; safe to call twice and after a failed open()."""

    def describe(self) -> DriverInfo:
        """What this driver instance is (defaults to `static_info` of its options)."""
        return self.static_info(self.options)

    @classmethod
    def example(cls) -> tuple[DeviceSetup, dict[str, Any]] | None:
        """A self-contained (setup, validated options) the contract test can open without hardware
        (a simulated source, ``loop://`` for serial drivers). Every built-in driver provides one."""
        return None

    # -- optional capabilities -------------------------------------------------------------
    def set_shunt(self, channel_index: int, on: bool) -> None:
        """Switch the shunt calibration resistor of one channel in or out."""
        raise NotSupported(f"{type(self).__name__} cannot switch a shunt resistor")

    # -- reporting, drained by the supervisor ----------------------------------------------
    def report(self, kind: str, **detail: Any) -> None:
        """Queue an event for the events table (cheap; call it from read_block)."""
        self._events.append(DriverEvent(kind, detail, time.time_ns()))

    def count(self, name: str, n: int = 1) -> None:
        """Add to a named counter (shown by ``straind status``)."""
        self.counters[name] = self.counters.get(name, 0) + n

    def drain_events(self) -> list[DriverEvent]:
        out = list(self._events)
        self._events.clear()
        return out

    def __enter__(self) -> "Driver":
        self.open()
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
