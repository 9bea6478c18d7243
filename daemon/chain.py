"""The channel chain: raw converter codes of one device -> engineering values, per block.

For every channel the whole conversion code -> ratio (V/V) -> tared ratio -> bridge inverse ->
strain (or transducer value) is folded, where it is exact to do so, into one Moebius map

    value = (A * code + B) / (C * code + D)

with per-column coefficient rows, so a block of n samples x m channels costs a handful of numpy
operations whatever m is. Channels whose inverse is not a Moebius map (custom arm arrangements,
certificate polynomials of degree > 1, semiconductor gauges) are converted column by column with
their own exact vectorised inverse. Saturated and open-bridge samples are flagged and NaN, never
converted as data. The zero (tare) is a measured ratio; the chain maps it to zero strain.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from straind import bridge, transducer
from straind.block import CODE_MAX, CODE_MIN, UNUSABLE, Block, EngineeringBlock, Quality
from straind.layout import ChannelLayout, DeviceLayout

__all__ = ["ChannelConverter", "DeviceChain", "channel_unit", "channel_quantity",
           "build_converter", "CONVERTER_BUILDERS"]

MICRO = 1e6


def channel_unit(ch: Mapping[str, Any]) -> str:
    if ch["sensor"] == "strain_gauge":
        return "microstrain"
    return str(ch.get("unit", ""))


def channel_quantity(ch: Mapping[str, Any]) -> str:
    if ch["sensor"] == "strain_gauge":
        return "strain"
    return str(ch.get("quantity", "other"))


@dataclass
class ChannelConverter:
    """Conversion of one channel from ratio (V/V, already tared) to its engineering value.

    Either `mobius` = (a, b, c, d) with value = (a V + b) / (c V + d) exactly, or `func`
    mapping a ratio array to (values, ok mask). `model_zero_ratio` is the ratio the model gives
    at zero strain/load: the tare maps the measured zero to it. `attrs` go to HDF5 and metadata.
    """

    name: str
    unit: str
    quantity: str
    mobius: tuple[float, float, float, float] | None
    func: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]] | None
    model_zero_ratio: float
    valid_range: Callable[[np.ndarray], np.ndarray] | None = None
    attrs: dict[str, Any] = field(default_factory=dict)
    full_scale_ratio: float = float("nan")

    def convert_ratio(self, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Engineering values (and ok mask) from tared ratios, for one column."""
        if self.mobius is not None:
            a, b, c, d = self.mobius
            out = (a * v + b) / (c * v + d)
            ok = np.isfinite(out)
            if self.valid_range is not None:
                ok &= self.valid_range(out)
            return out, ok
        assert self.func is not None
        return self.func(v)


def _strain_converter(ch: Mapping[str, Any]) -> ChannelConverter:
    circuit = bridge.circuit_for(
        ch["bridge"], gauge_ohm=ch["gauge_ohm"], completion_ohm=ch["completion_ohm"],
        lead_ohm=ch["lead_ohm"], wiring=ch["wiring"], poisson=ch["poisson"], arms=ch["arms"])
    inverse = bridge.BridgeInverse(circuit)
    gf = float(ch["gauge_factor"])
    gf2 = float(ch.get("gauge_factor_2", 0.0) or 0.0)
    x_lo, x_hi = inverse.x_domain
    scale = MICRO / gf

    def physical(microstrain: np.ndarray) -> np.ndarray:
        # every arm resistance (leads included) must stay positive: x inside the domain
        x = microstrain / scale
        return (x > x_lo) & (x < x_hi)

    mobius = None
    func = None
    if inverse.mobius is not None and gf2 == 0.0:
        a, b, c, d = inverse.mobius
        mobius = (a * scale, b * scale, c, d)
    else:
        def func(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            x, ok = inverse.x_from_ratio(v)
            eps = bridge.strain_from_x(x, gf, gf2) * MICRO
            ok = ok & np.isfinite(eps)
            return eps, ok

    attrs = {
        "sensor": "strain_gauge", "bridge": ch["bridge"], "wiring": ch["wiring"],
        "gauge_factor": gf, "gauge_ohm": float(ch["gauge_ohm"]),
        "completion_ohm": float(ch["completion_ohm"]), "lead_ohm": float(ch["lead_ohm"]),
        "excitation_v": float(ch["excitation_v"]),
    }
    if ch["poisson"] is not None:
        attrs["poisson"] = float(ch["poisson"])
    if ch["arms"] is not None:
        attrs["arms"] = ",".join(f"{k:g}" for k in ch["arms"])
    if ch.get("shunt"):
        attrs["shunt_ohm"] = float(ch["shunt"]["ohm"])
        attrs["shunt_arm"] = int(ch["shunt"]["arm"])
    zero = float(bridge.ratio_forward(circuit, np.zeros(1))[0])
    return ChannelConverter(ch["name"], "microstrain", "strain", mobius, func, zero,
                            physical if mobius is not None else None, attrs)


def _transducer_converter(ch: Mapping[str, Any]) -> ChannelConverter:
    attrs: dict[str, Any] = {"sensor": "bridge_transducer", "quantity": ch["quantity"],
                             "excitation_v": float(ch["excitation_v"])}
    if ch["certificate"] is None:
        s, cap = float(ch["rated_output_mv_per_v"]), float(ch["capacity"])
        gain = float(transducer.value_from_rated(np.ones(1), s, cap)[0])  # value per V/V
        attrs.update(rated_output_mv_per_v=s, capacity=cap)
        return ChannelConverter(ch["name"], ch["unit"], ch["quantity"], (gain, 0.0, 0.0, 1.0),
                                None, 0.0, None, attrs)
    pts = np.asarray(ch["certificate"]["points"], dtype=float)
    cert = transducer.fit_certificate(pts[:, 0], pts[:, 1], ch["certificate"]["degree"])
    attrs.update(certificate_degree=cert.degree,
                 certificate_points=";".join(f"{a:g}:{b:g}" for a, b in pts),
                 certificate_max_residual=float(cert.max_abs_residual))

    def func(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        out = np.asarray(cert.evaluate(v), dtype=float)
        return out, np.isfinite(out)

    # the value of zero load is whatever the certificate says at 0 mV/V; tare maps to 0 mV/V
    return ChannelConverter(ch["name"], ch["unit"], ch["quantity"], None, func, 0.0, None, attrs)


#: sensor -> function(channel config) -> ChannelConverter; measurement modules add theirs.
CONVERTER_BUILDERS: dict[str, Callable[[Mapping[str, Any]], ChannelConverter]] = {
    "strain_gauge": _strain_converter,
    "bridge_transducer": _transducer_converter,
}


def build_converter(ch: Mapping[str, Any]) -> ChannelConverter:
    return CONVERTER_BUILDERS[ch["sensor"]](ch)


class DeviceChain:
    """Converts the raw blocks of one device; holds each channel's zero (tare).

    zeros: channel name -> measured ratio at tare (V/V), or absent when no zero has been taken
    (the channel then reads relative to the model's balanced bridge).
    """

    def __init__(self, device: Mapping[str, Any], zeros: Mapping[str, float] | None = None,
                 native: str = "code24", gains: Mapping[str, float] | None = None):
        self.device = device
        self.native = native
        chans = device["channels"]
        self.converters = [build_converter(ch) for ch in chans]
        self.names = tuple(c.name for c in self.converters)
        self.units = tuple(c.unit for c in self.converters)
        m = len(chans)
        adc = device.get("adc") or {}
        if native == "code24":
            self.ratio_per_code = np.array([
                bridge.ratio_scale(adc["gain"], adc.get("reference", "excitation"),
                                   adc.get("vref_v"), ch["excitation_v"]) for ch in chans])
        else:
            self.ratio_per_code = np.ones(m)
        for conv in self.converters:
            conv.attrs.setdefault("gain", int(adc.get("gain", 1)) if adc else 1)
        self.gain_correction = np.ones(m)
        self.zero_ratio = np.full(m, np.nan)
        for i, name in enumerate(self.names):
            if zeros and name in zeros and zeros[name] is not None:
                self.zero_ratio[i] = float(zeros[name])
        for i, name in enumerate(self.names):
            if gains and gains.get(name) is not None:
                self.gain_correction[i] = float(gains[name])
        self._mobius_cols = np.array([i for i, c in enumerate(self.converters) if c.mobius is not None],
                                     dtype=np.intp)
        self._func_cols = [i for i, c in enumerate(self.converters) if c.mobius is None]
        self._rebuild()

    # -- zero ---------------------------------------------------------------------------------
    def offsets(self) -> np.ndarray:
        """Ratio subtracted before the inverse: measured zero minus the model's zero (0 untared)."""
        model0 = np.array([c.model_zero_ratio for c in self.converters])
        return np.where(np.isnan(self.zero_ratio), 0.0, self.zero_ratio - model0)

    def set_zero(self, index: int, zero_ratio: float | None) -> None:
        self.zero_ratio[index] = np.nan if zero_ratio is None else float(zero_ratio)
        self._rebuild()

    def set_gain_correction(self, index: int, factor: float) -> None:
        """Multiply the channel's values by `factor` (from a shunt calibration the user applied)."""
        if not np.isfinite(factor) or factor <= 0:
            raise ValueError(f"gain correction must be a positive number, got {factor!r}")
        self.gain_correction[index] = float(factor)
        self._rebuild()

    def _rebuild(self) -> None:
        """Fold ratio-per-code, offset and gain correction into each Moebius column's
        coefficients."""
        off = self.offsets()
        cols = self._mobius_cols
        coeff = np.array([self.converters[i].mobius for i in cols], dtype=float).reshape(-1, 4)
        s = self.ratio_per_code[cols]
        a, b, c, d = coeff.T
        o = off[cols]
        g = self.gain_correction[cols]
        # value = g (a (s q - o) + b) / (c (s q - o) + d)
        self._A = g * a * s
        self._B = g * (b - a * o)
        self._C = c * s
        self._D = d - c * o
        self._all_mobius = len(cols) == len(self.converters)
        self._checks = [(k, i) for k, i in enumerate(cols)
                        if self.converters[i].valid_range is not None]

    # -- conversion ---------------------------------------------------------------------------
    def ratio(self, block: Block) -> np.ndarray:
        """Untared ratio (V/V) of every sample, float64 (n, m)."""
        return block.data.astype(np.float64) * self.ratio_per_code

    def convert(self, block: Block) -> EngineeringBlock:
        data = block.data
        q = data.astype(np.float64)
        quality = block.quality.copy()
        if self.native == "code24":
            sat = (data == CODE_MAX) | (data == CODE_MIN)
            if sat.any():
                quality[sat] |= np.uint8(Quality.SATURATED)
        values = np.empty(q.shape, dtype=np.float64)
        cols = self._mobius_cols
        if len(cols):
            if self._all_mobius:
                with np.errstate(divide="ignore", invalid="ignore"):
                    np.divide(self._A * q + self._B, self._C * q + self._D, out=values)
            else:
                qc = q[:, cols]
                with np.errstate(divide="ignore", invalid="ignore"):
                    values[:, cols] = (self._A * qc + self._B) / (self._C * qc + self._D)
            for k, i in self._checks:
                bad = ~self.converters[i].valid_range(values[:, i])
                if bad.any():
                    quality[bad, i] |= np.uint8(Quality.OUT_OF_RANGE)
        if self._func_cols:
            off = self.offsets()
            for i in self._func_cols:
                v = q[:, i] * self.ratio_per_code[i] - off[i]
                out, ok = self.converters[i].convert_ratio(v)
                values[:, i] = out * self.gain_correction[i]
                if not ok.all():
                    quality[~ok, i] |= np.uint8(Quality.OUT_OF_RANGE)
        bad = (quality & UNUSABLE) != 0
        if bad.any():
            values[bad] = np.nan
        nonfinite = ~np.isfinite(values) & ~bad
        if nonfinite.any():
            quality[nonfinite] |= np.uint8(Quality.OUT_OF_RANGE)
        return EngineeringBlock(raw=block, values=values, quality=quality, names=self.names,
                                units=self.units)

    # -- description --------------------------------------------------------------------------
    def channel_layouts(self, extra_attrs: Mapping[str, Mapping[str, Any]] | None = None
                        ) -> tuple[ChannelLayout, ...]:
        out = []
        for i, conv in enumerate(self.converters):
            attrs = dict(conv.attrs)
            attrs["zero_ratio"] = float(self.zero_ratio[i])
            attrs["ratio_per_code"] = float(self.ratio_per_code[i])
            attrs["gain_correction"] = float(self.gain_correction[i])
            if extra_attrs and conv.name in extra_attrs:
                attrs.update(extra_attrs[conv.name])
            out.append(ChannelLayout(conv.name, i, conv.quantity, conv.unit, True, attrs))
        return tuple(out)

    def device_layout(self, driver: str, extra_attrs: Mapping[str, Mapping[str, Any]] | None = None
                      ) -> DeviceLayout:
        dev = self.device
        return DeviceLayout(
            name=dev["name"], driver=driver, sample_rate_hz=float(dev["sample_rate_hz"]),
            raw_dtype="int32" if self.native == "code24" else "float64",
            n_raw=len(self.converters), channels=self.channel_layouts(extra_attrs),
            attrs={"description": dev.get("description", ""),
                   "block_samples": int(dev["block_samples"])})

    def range_table(self) -> list[dict[str, Any]]:
        """Per channel: the engineering value at +/- full-scale code and per code at zero."""
        rows = []
        off = self.offsets()
        for i, conv in enumerate(self.converters):
            s = self.ratio_per_code[i]
            codes = np.array([CODE_MIN + 1, CODE_MAX - 1, 0, 1], dtype=np.float64)
            v = codes * s - off[i]
            out, ok = conv.convert_ratio(v)
            lo, hi = sorted((out[0], out[1]))
            rows.append({"name": conv.name, "unit": conv.unit, "min": float(lo), "max": float(hi),
                         "resolution": float(abs(out[3] - out[2])),
                         "ratio_per_code": float(s), "ok": bool(ok[0] and ok[1])})
        return rows


def layouts_for(chains: Sequence[tuple[DeviceChain, str]]) -> list[DeviceLayout]:
    return [chain.device_layout(driver) for chain, driver in chains]
