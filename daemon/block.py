"""The Block: the unit of work that flows from a driver through the chain to the sinks.

A block holds n samples x m channels of one device, as the device delivered them, with the
device's own sample counter so that times come from the sample clock, not from the host's
arrival time. Everything downstream works on whole blocks with numpy.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field, replace

import numpy as np

__all__ = ["Quality", "Block", "EngineeringBlock", "CODE_MIN", "CODE_MAX"]

#: Signed 24-bit converter limits; these two codes mean "at or beyond full scale".
CODE_MIN = -(1 << 23)
CODE_MAX = (1 << 23) - 1


class Quality(enum.IntFlag):
    """Per-sample, per-channel quality bits (uint8 in blocks and in the HDF5 `quality` dataset)."""

    OK = 0
    SATURATED = 1          #: code at or beyond full scale: never converted as data
    OPEN_BRIDGE = 2        #: front-end reports an open bridge or broken lead
    EXCITATION_FAULT = 4   #: front-end reports excitation out of tolerance
    AFTER_GAP = 8          #: first sample after lost samples (frames lost, reconnect)
    CLOCK_UNSYNCED = 16    #: wall clock not known to be synchronised when the segment was anchored
    OUT_OF_RANGE = 32      #: raw value valid but the inverse has no physical solution
    SHUNT_ON = 64          #: shunt calibration resistor switched in: not a measurement of load
    INVALID = 128          #: anything else that makes the value unusable (driver-specific)


#: Bits that make the engineering value NaN.
UNUSABLE = Quality.SATURATED | Quality.OPEN_BRIDGE | Quality.OUT_OF_RANGE | Quality.INVALID


@dataclass(frozen=True, eq=False)
class Block:
    """Raw samples from one device.

    data:         (n, m) int32 converter codes, or float64 for drivers with a native float scale.
    quality:      (n, m) uint8 `Quality` bits set by the driver (saturation is also set by the chain).
    start_index:  the device's sample counter of the first sample (counts every sample the device
                  produced since the driver opened, including lost ones, so gaps are visible).
    period_ns:    nominal sample period in nanoseconds.
    seq:          block sequence number from the driver, starting at 0 on each open.
    host_mono_ns: host monotonic clock when the block was received (time.monotonic_ns()).
    host_wall_ns: host wall clock (UTC, time.time_ns()) when the block was received.
    t0_ns:        UTC time of the first sample in ns; set by the service's timebase, not by drivers
                  (drivers leave it None).
    """

    device: str
    data: np.ndarray
    quality: np.ndarray
    start_index: int
    period_ns: int
    seq: int
    host_mono_ns: int
    host_wall_ns: int
    t0_ns: int | None = None

    @property
    def n_samples(self) -> int:
        return int(self.data.shape[0])

    @property
    def n_channels(self) -> int:
        return int(self.data.shape[1])

    def times_ns(self) -> np.ndarray:
        """UTC sample times (int64 ns) from t0 and the nominal period."""
        if self.t0_ns is None:
            raise ValueError("block has no t0_ns: the timebase has not anchored it yet")
        return self.t0_ns + np.arange(self.n_samples, dtype=np.int64) * np.int64(self.period_ns)

    def with_time(self, t0_ns: int) -> "Block":
        return replace(self, t0_ns=int(t0_ns))

    def with_quality(self, quality: np.ndarray) -> "Block":
        return replace(self, quality=quality)

    @staticmethod
    def empty_quality(n: int, m: int) -> np.ndarray:
        return np.zeros((n, m), dtype=np.uint8)


@dataclass(frozen=True, eq=False)
class EngineeringBlock:
    """A block after the channel chain: raw values kept beside the engineering values.

    values:   (n, k) float64 engineering values in each channel's unit (NaN where unusable);
              k >= m: measured channels first, then derived channels in configuration order.
    quality:  (n, k) uint8 `Quality` bits.
    names:    k channel names, in column order.
    units:    k unit strings, in column order.
    """

    raw: Block
    values: np.ndarray
    quality: np.ndarray
    names: tuple[str, ...]
    units: tuple[str, ...]
    extra: dict = field(default_factory=dict)

    @property
    def device(self) -> str:
        return self.raw.device

    @property
    def t0_ns(self) -> int:
        assert self.raw.t0_ns is not None
        return self.raw.t0_ns

    @property
    def period_ns(self) -> int:
        return self.raw.period_ns

    @property
    def n_samples(self) -> int:
        return self.raw.n_samples

    def times_ns(self) -> np.ndarray:
        return self.raw.times_ns()
