"""What the sinks need to know about each device: its columns, units and per-channel metadata.

Built once per configuration by the service (from the validated config and the chain), and given
to the HDF5 store (dataset shapes and attributes) and the MQTT feed (metadata topic).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping

__all__ = ["ChannelLayout", "DeviceLayout"]


@dataclass(frozen=True)
class ChannelLayout:
    """One value column of a device.

    column:   index in EngineeringBlock.values (measured channels first, then derived).
    measured: True for a column that has a raw column of the same index, False for derived ones.
    attrs:    everything worth keeping about the channel (sensor, bridge, gauge_factor, gauge_ohm,
              lead_ohm, excitation_v, gain, zero_ratio, zero_taken_utc, calibration_version ...);
              values are str, int, float or bool only.
    """

    name: str
    column: int
    quantity: str
    unit: str
    measured: bool = True
    attrs: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class DeviceLayout:
    """One device: its driver, rate and columns.

    raw_dtype: "int32" for converter codes, "float64" for drivers that deliver floats.
    n_raw:     number of raw (measured) columns; raw datasets are (N, n_raw).
    """

    name: str
    driver: str
    sample_rate_hz: float
    raw_dtype: str
    n_raw: int
    channels: tuple[ChannelLayout, ...]
    attrs: Mapping[str, Any] = field(default_factory=dict)

    @property
    def period_ns(self) -> int:
        return int(round(1e9 / self.sample_rate_hz))

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.channels)

    @property
    def units(self) -> tuple[str, ...]:
        return tuple(c.unit for c in self.channels)
