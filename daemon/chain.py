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

from straind import bridge, temperature, transducer
from straind.block import CODE_MAX, CODE_MIN, UNUSABLE, Block, EngineeringBlock, Quality
from straind.config import TEMPERATURE_SENSORS, channel_reference
from straind.layout import ChannelLayout, DeviceLayout

__all__ = ["ChannelConverter", "DeviceChain", "channel_unit", "channel_quantity",
           "build_converter", "CONVERTER_BUILDERS", "channel_ratio_per_code"]

MICRO = 1e6
FULL_SCALE = float(1 << 23)


def channel_unit(ch: Mapping[str, Any]) -> str:
    if ch["sensor"] == "strain_gauge":
        return "microstrain"
    if ch["sensor"] in TEMPERATURE_SENSORS:
        return "degC"
    return str(ch.get("unit", ""))


def channel_quantity(ch: Mapping[str, Any]) -> str:
    if ch["sensor"] == "strain_gauge":
        return "strain"
    if ch["sensor"] in TEMPERATURE_SENSORS:
        return "temperature"
    return str(ch.get("quantity", "other"))


def channel_ratio_per_code(ch: Mapping[str, Any], adc: Mapping[str, Any] | None,
                           native: str = "code24") -> float:
    """What one converter code means for this channel, with its own gain/reference if given.

    Bridges: V/V of excitation (bridge.ratio_scale). RTD: R_rtd / R_ref (ratiometric against
    the series reference resistor: full scale = R_ref). Thermocouple: volts, vref_v / (2**23 G).
    Drivers with a native float scale deliver these quantities directly (1 per unit).
    """
    if native != "code24":
        return 1.0
    gain, reference, vref_v = channel_reference(ch, adc)
    if ch["sensor"] == "rtd":
        return 1.0 / (FULL_SCALE * gain)
    if ch["sensor"] == "thermocouple":
        return float(vref_v) / (FULL_SCALE * gain)
    return bridge.ratio_scale(gain, reference, vref_v, ch["excitation_v"])


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
    #: (lo, hi): the open interval of values valid_range accepts, for the vectorised check
    value_bounds: tuple[float, float] | None = None
    #: temperature channels: no tare; a thermocouple may read its cold junction from another
    #: channel (`junction`), then `func_junction(v, junction_c)` converts.
    tareable: bool = True
    junction: str | None = None
    func_junction: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]] | None = None

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
                            physical if mobius is not None else None, attrs,
                            value_bounds=(tuple(sorted((x_lo * scale, x_hi * scale)))
                                          if mobius is not None else None))


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


_RTD_R0_OHM = {"pt100": temperature.PT100_R0_OHM, "pt1000": temperature.PT1000_R0_OHM}


def _rtd_converter(ch: Mapping[str, Any]) -> ChannelConverter:
    """RTD: ratio R/R_ref -> ohm (minus 2 leads for 2-wire) -> Callendar-Van Dusen inverse."""
    r0 = _RTD_R0_OHM[ch["element"]]
    r_ref = float(ch["reference_ohm"])
    leads = 2.0 * float(ch["lead_ohm"]) if ch["wiring"] == "2-wire" else 0.0

    def func(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r = temperature.rtd_ohm_from_ratio(v, r_ref) - leads
        t = temperature.rtd_temperature(r, r0)
        return t, np.isfinite(t)

    attrs = {"sensor": "rtd", "element": ch["element"], "r0_ohm": r0, "reference_ohm": r_ref,
             "wiring": ch["wiring"], "lead_ohm": float(ch["lead_ohm"]),
             "standard": "IEC 60751 Callendar-Van Dusen"}
    if ch.get("excitation_v") is not None:
        attrs["excitation_v"] = float(ch["excitation_v"])
    return ChannelConverter(ch["name"], "degC", "temperature", None, func, 0.0, None, attrs,
                            tareable=False)


def _thermocouple_converter(ch: Mapping[str, Any]) -> ChannelConverter:
    """Thermocouple: volts -> mV -> ITS-90 inverse with cold-junction compensation."""
    tc = ch["type"]

    def func_junction(v: np.ndarray, tj: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        t = temperature.tc_temperature_with_cjc(tc, v * 1e3, tj)
        return t, np.isfinite(t)

    fixed = 0.0 if ch["junction_c"] is None else float(ch["junction_c"])

    def func(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return func_junction(v, np.float64(fixed))

    attrs: dict[str, Any] = {"sensor": "thermocouple", "type": tc,
                             "standard": "ITS-90 reference functions (NIST Monograph 175)"}
    if ch["junction_channel"] is not None:
        attrs["junction_channel"] = ch["junction_channel"]
    else:
        attrs["junction_c"] = fixed
    return ChannelConverter(ch["name"], "degC", "temperature", None, func, 0.0, None, attrs,
                            tareable=False, junction=ch["junction_channel"],
                            func_junction=func_junction)


#: sensor -> function(channel config) -> ChannelConverter; measurement modules add theirs.
CONVERTER_BUILDERS: dict[str, Callable[[Mapping[str, Any]], ChannelConverter]] = {
    "strain_gauge": _strain_converter,
    "bridge_transducer": _transducer_converter,
    "rtd": _rtd_converter,
    "thermocouple": _thermocouple_converter,
}


def _temperature_order(converters: Sequence[ChannelConverter]) -> list[int]:
    """Temperature columns, each after the column its cold junction is read from."""
    names = [c.name for c in converters]
    todo = [i for i, c in enumerate(converters) if not c.tareable and c.mobius is None]
    order: list[int] = []
    while todo:
        progressed = False
        for i in list(todo):
            j = converters[i].junction
            if j is None or names.index(j) in order:
                order.append(i)
                todo.remove(i)
                progressed = True
        if not progressed:
            raise ValueError("cold-junction links form a loop: " +
                             ", ".join(converters[i].name for i in todo))
    return order


def build_converter(ch: Mapping[str, Any]) -> ChannelConverter:
    return CONVERTER_BUILDERS[ch["sensor"]](ch)


class DeviceChain:
    """Converts the raw blocks of one device; holds each channel's zero (tare).

    zeros: channel name -> measured ratio at tare (V/V), or absent when no zero has been taken
    (the channel then reads relative to the model's balanced bridge).

    Column order of the engineering blocks: the measured channels in configuration order, then
    the derived columns (`devices[].derived`). `names`/`units` cover all columns,
    `measured_names` the measured ones. Within a block: Moebius columns in one numpy expression;
    other bridge columns one by one; temperature channels (no tare; each thermocouple after its
    cold-junction channel); gauge corrections (thermal output, GF(T), transverse pairs); derived
    columns. `on_note(kind, channel, detail, persist)` (set by the service) hears of the choices
    the chain makes by itself (the first-block temperature reference, a creep reference), so
    they can be recorded as events and kept in the state file.
    """

    def __init__(self, device: Mapping[str, Any], zeros: Mapping[str, float] | None = None,
                 native: str = "code24", gains: Mapping[str, float] | None = None):
        from straind.derived import CorrectionStage, DerivedStage
        self.device = device
        self.native = native
        self.on_note: Callable[[str, str, dict, dict], None] | None = None
        chans = device["channels"]
        self.converters = [build_converter(ch) for ch in chans]
        self.measured_names = tuple(c.name for c in self.converters)
        m = len(chans)
        adc = device.get("adc") or {}
        self.ratio_per_code = np.array([channel_ratio_per_code(ch, adc, native) for ch in chans])
        for conv, ch in zip(self.converters, chans):
            gain, reference, vref_v = channel_reference(ch, adc)
            conv.attrs.setdefault("gain", gain if adc else 1)
            if adc and ch["sensor"] != "rtd":
                conv.attrs.setdefault("reference", reference)
                if reference == "external":
                    conv.attrs.setdefault("vref_v", float(vref_v))
        self.tareable = np.array([c.tareable for c in self.converters], dtype=bool)
        self.gain_correction = np.ones(m)
        self.zero_ratio = np.full(m, np.nan)
        for i, name in enumerate(self.measured_names):
            if zeros and name in zeros and zeros[name] is not None and self.tareable[i]:
                self.zero_ratio[i] = float(zeros[name])
        for i, name in enumerate(self.measured_names):
            if gains and gains.get(name) is not None:
                self.gain_correction[i] = float(gains[name])
        self._mobius_cols = np.array([i for i, c in enumerate(self.converters) if c.mobius is not None],
                                     dtype=np.intp)
        self._func_cols = [i for i, c in enumerate(self.converters)
                           if c.mobius is None and c.tareable]
        self._temp_cols = _temperature_order(self.converters)
        self._junction_col = {i: self.measured_names.index(self.converters[i].junction)
                              for i in self._temp_cols if self.converters[i].junction is not None}
        self.corrections = CorrectionStage(chans, lambda: self.on_note)
        self.derived = DerivedStage(device, self.measured_names,
                                    lambda i: not np.isnan(self.zero_ratio[i]),
                                    lambda: self.on_note)
        self._has_derived = bool(self.derived.entries)
        self._has_corrections = self.corrections.active
        self.names = self.measured_names + tuple(self.derived.names)
        self.units = tuple(c.unit for c in self.converters) + tuple(self.derived.units)
        self._rebuild()

    # -- zero ---------------------------------------------------------------------------------
    def offsets(self) -> np.ndarray:
        """Ratio subtracted before the inverse: measured zero minus the model's zero (0 untared)."""
        model0 = np.array([c.model_zero_ratio for c in self.converters])
        return np.where(np.isnan(self.zero_ratio), 0.0, self.zero_ratio - model0)

    def set_zero(self, index: int, zero_ratio: float | None) -> None:
        if not self.tareable[index]:
            raise ValueError(f"channel {self.measured_names[index]!r} is a temperature channel: "
                             "tare does not apply")
        self.zero_ratio[index] = np.nan if zero_ratio is None else float(zero_ratio)
        self._rebuild()

    def set_gain_correction(self, index: int, factor: float) -> None:
        """Multiply the channel's values by `factor` (from a shunt calibration the user applied)."""
        if not np.isfinite(factor) or factor <= 0:
            raise ValueError(f"gain correction must be a positive number, got {factor!r}")
        self.gain_correction[index] = float(factor)
        self._rebuild()

    # -- temperature reference of compensated gauges and other kept state -----------------------
    def temperature_for(self, index: int) -> float | None:
        """Mean temperature (degC) of gauge `index`'s temperature channel over the last block
        (None when the gauge has no temperature link or no temperature was read yet)."""
        return self.corrections.temperature_for(index)

    def step_factor(self, index: int) -> float:
        """How the gauge corrections scale a step of channel `index`'s own reading (GF(T) and
        transverse pair factors; 1 without corrections): the expected step of a shunt
        calibration is multiplied by it."""
        return self.corrections.step_factor(index)

    def set_temperature_zero(self, index: int, t_zero_c: float | None) -> None:
        """The temperature at the gauge's tare (T_zero of the thermal output correction)."""
        self.corrections.set_temperature_zero(index, t_zero_c)

    def restore(self, get_state: Callable[[str], Any]) -> None:
        """Reload what the state file keeps beyond zeros and gains: T_zero of compensated gauges
        and creep references. get_state(name) -> a ChannelState-like object."""
        for t in self.corrections.thermal:
            self.corrections.set_temperature_zero(t.col, get_state(t.name).temperature_at_zero_c)
        for e in self.derived.entries:
            if e.cfg["kind"] == "creep" and e.cfg["reference"] == "first":
                extra = getattr(get_state(e.cfg["name"]), "extra", None) or {}
                self.derived.restore(e.cfg["name"], extra.get("creep_reference_microstrain"))

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
        # the same checks as one operation over the columns whose bounds are known
        vec = [i for _, i in self._checks if self.converters[i].value_bounds is not None]
        self._check_cols = np.array(vec, dtype=np.intp)
        self._check_lo = np.array([self.converters[i].value_bounds[0] for i in vec])
        self._check_hi = np.array([self.converters[i].value_bounds[1] for i in vec])
        self._checks = [(k, i) for k, i in self._checks
                        if self.converters[i].value_bounds is None]

    # -- conversion ---------------------------------------------------------------------------
    def ratio(self, block: Block) -> np.ndarray:
        """Untared ratio (V/V) of every sample, float64 (n, m)."""
        return block.data.astype(np.float64) * self.ratio_per_code

    def convert(self, block: Block) -> EngineeringBlock:
        data = block.data
        q = data.astype(np.float64)
        n, m = q.shape
        if self._has_derived:
            full = np.empty((n, self.derived.k), dtype=np.float64)
            values = full[:, :m]
            quality_full = np.zeros((n, self.derived.k), dtype=np.uint8)
            quality_full[:, :m] = block.quality
            quality = quality_full[:, :m]
        else:
            values = np.empty(q.shape, dtype=np.float64)
            quality = block.quality.copy()
        if self.native == "code24":
            sat = (data == CODE_MAX) | (data == CODE_MIN)
            if sat.any():
                quality[sat] |= np.uint8(Quality.SATURATED)
        cols = self._mobius_cols
        if len(cols):
            if self._all_mobius:
                with np.errstate(divide="ignore", invalid="ignore"):
                    np.divide(self._A * q + self._B, self._C * q + self._D, out=values)
            else:
                qc = q[:, cols]
                with np.errstate(divide="ignore", invalid="ignore"):
                    values[:, cols] = (self._A * qc + self._B) / (self._C * qc + self._D)
            if len(self._check_cols):
                vc = values[:, self._check_cols]
                with np.errstate(invalid="ignore"):
                    bad = ~((vc > self._check_lo) & (vc < self._check_hi))
                if bad.any():
                    quality[:, self._check_cols] |= bad.astype(np.uint8) * np.uint8(
                        Quality.OUT_OF_RANGE)
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
        for i in self._temp_cols:
            self._convert_temperature(i, q, values, quality)
        bad = (quality & UNUSABLE) != 0
        if bad.any():
            values[bad] = np.nan
        nonfinite = ~np.isfinite(values) & ~bad
        if nonfinite.any():
            quality[nonfinite] |= np.uint8(Quality.OUT_OF_RANGE)
        if self._has_corrections:
            with np.errstate(invalid="ignore"):
                self.corrections.apply(values, quality)
            bad = (quality & UNUSABLE) != 0
            if bad.any():
                values[bad] = np.nan
        if self._has_derived:
            with np.errstate(invalid="ignore", divide="ignore"):
                times = (block.times_ns() if block.t0_ns is not None else  # unstamped: clock
                         (block.start_index + np.arange(n, dtype=np.int64)) * block.period_ns)
                self.derived.apply(times, full, quality_full)
            values, quality = full, quality_full
        return EngineeringBlock(raw=block, values=values, quality=quality, names=self.names,
                                units=self.units)

    def _convert_temperature(self, i: int, q: np.ndarray, values: np.ndarray,
                             quality: np.ndarray) -> None:
        """One temperature column (no tare offset; cold junction from its column if linked)."""
        conv = self.converters[i]
        v = q[:, i] * self.ratio_per_code[i]
        j = self._junction_col.get(i)
        with np.errstate(invalid="ignore"):
            if j is None:
                out, ok = conv.convert_ratio(v)
            else:
                assert conv.func_junction is not None
                quality[:, i] |= quality[:, j]
                out, ok = conv.func_junction(v, values[:, j])
        values[:, i] = out
        if not ok.all():
            quality[~ok, i] |= np.uint8(Quality.OUT_OF_RANGE)
        bad = (quality[:, i] & UNUSABLE) != 0
        if bad.any():
            values[bad, i] = np.nan

    # -- description --------------------------------------------------------------------------
    def channel_layouts(self, extra_attrs: Mapping[str, Mapping[str, Any]] | None = None
                        ) -> tuple[ChannelLayout, ...]:
        out = []
        chans = self.device["channels"]
        for i, conv in enumerate(self.converters):
            attrs = dict(conv.attrs)
            attrs.update(_correction_attrs(chans[i]))
            attrs.update(self.corrections.attrs(i))
            if conv.tareable:
                attrs["zero_ratio"] = float(self.zero_ratio[i])
                attrs["gain_correction"] = float(self.gain_correction[i])
            attrs["ratio_per_code"] = float(self.ratio_per_code[i])
            if extra_attrs and conv.name in extra_attrs:
                extra = dict(extra_attrs[conv.name])
                if not conv.tareable:
                    for k in ("zero_taken_ns", "zero_origin", "gain_correction"):
                        extra.pop(k, None)
                attrs.update(extra)
            out.append(ChannelLayout(conv.name, i, conv.quantity, conv.unit, True, attrs))
        m = len(self.converters)
        for k, (name, unit, qty, attrs) in enumerate(zip(
                self.derived.names, self.derived.units, self.derived.quantities,
                self.derived.column_attrs())):
            out.append(ChannelLayout(name, m + k, qty, unit, False, attrs))
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
        """Per measured channel: the engineering value at +/- full-scale code and per code at
        zero (temperature channels: the span of the sensor's function reachable within the
        codes, and per code at 0 degC or the nearest reachable temperature; thermocouples with a
        junction channel assume the junction at 0 degC here)."""
        rows = []
        off = self.offsets()
        for i, conv in enumerate(self.converters):
            s = self.ratio_per_code[i]
            if not conv.tareable:
                rows.append(self._temperature_range(conv, s))
                continue
            codes = np.array([CODE_MIN + 1, CODE_MAX - 1, 0, 1], dtype=np.float64)
            v = codes * s - off[i]
            out, ok = conv.convert_ratio(v)
            lo, hi = sorted((out[0], out[1]))
            rows.append({"name": conv.name, "unit": conv.unit, "min": float(lo), "max": float(hi),
                         "resolution": float(abs(out[3] - out[2])),
                         "ratio_per_code": float(s), "ok": bool(ok[0] and ok[1])})
        return rows

    @staticmethod
    def _temperature_range(conv: ChannelConverter, s: float) -> dict[str, Any]:
        codes = np.linspace(CODE_MIN + 1, CODE_MAX - 1, 1 << 16).round()
        with np.errstate(invalid="ignore"):
            out, ok = conv.convert_ratio(codes * s)
        fin = np.isfinite(out)
        row = {"name": conv.name, "unit": conv.unit, "min": float("nan"), "max": float("nan"),
               "resolution": float("nan"), "ratio_per_code": float(s), "ok": bool(fin.any())}
        if fin.any():
            row["min"], row["max"] = float(out[fin].min()), float(out[fin].max())
            k = int(np.argmin(np.where(fin, np.abs(out), np.inf)))
            pair, _ = conv.convert_ratio(np.array([codes[k], codes[k] + 1.0]) * s)
            row["resolution"] = float(abs(pair[1] - pair[0]))
        return row


def _correction_attrs(ch: Mapping[str, Any]) -> dict[str, Any]:
    """HDF5/metadata attributes of a gauge's corrections and gauge model."""
    a: dict[str, Any] = {}
    if ch["sensor"] != "strain_gauge":
        return a
    if ch.get("gauge_factor_2"):
        a["gauge_factor_2"] = float(ch["gauge_factor_2"])
    if ch.get("gauge_type"):
        a["gauge_type"] = ch["gauge_type"]
    th = ch.get("thermal")
    if th:
        a["thermal_compensation"] = th["compensation"]
        if th["temperature_channel"]:
            a["temperature_channel"] = th["temperature_channel"]
        if th["thermal_output"]:
            a["thermal_output_coefficients"] = ",".join(
                f"{c:.10g}" for c in th["thermal_output"]["coefficients"])
            a["thermal_output_gauge_factor_ref"] = float(th["thermal_output"]["gauge_factor_ref"])
        a["gf_alpha_per_c"] = float(th["gf_alpha_per_c"])
        a["gf_ref_temp_c"] = float(th["gf_ref_temp_c"])
    tv = ch.get("transverse")
    if tv:
        a["transverse_kt"] = float(tv["kt"])
        a["transverse_pair"] = tv["pair"]
    return a


def layouts_for(chains: Sequence[tuple[DeviceChain, str]]) -> list[DeviceLayout]:
    return [chain.device_layout(driver) for chain, driver in chains]
