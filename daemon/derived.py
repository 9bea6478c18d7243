"""Per-block stages after the bridge inverse: gauge corrections and derived value columns.

`CorrectionStage` corrects measured strain-gauge columns in place, in this order:

1. thermal output (``thermal.compensation: software``): eps - (eps_app(T) - eps_app(T_zero)),
   T from the gauge's temperature channel, T_zero the temperature at the gauge's last tare
   (until a tare exists: the mean temperature of the first block with one, recorded as an
   event and kept in the state file);
2. gauge factor drift (``thermal.gf_alpha_per_c``): eps * GF / GF(T), GF(T) = GF (1 + alpha
   (T - gf_ref_temp_c)), for any compensation mode (a dummy gauge cancels the thermal output,
   not the change of gauge factor);
3. transverse sensitivity of an orthogonal pair (``transverse: {kt, pair}``), on the readings
   corrected by 1 and 2.

The quality bits of the temperature channel (and of the pair's other gauge) are ORed into the
corrected gauge: an unusable temperature makes the compensated strain unusable.

`DerivedStage` appends derived columns (rosette principal strains and stresses, uniaxial stress,
creep strain and creep rate) after the measured ones; the quality of a derived sample is the OR
of its inputs' quality bits. Samples with the shunt switched in (Quality.SHUNT_ON) are left out
of creep rates (they are not a measurement of load).

Both stages are vectorised over the block; the only state kept between blocks is T_zero, the
creep reference and the creep-rate window.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from straind import rosette, thermal
from straind.block import Quality
from straind.config import derived_inputs, derived_outputs
from straind.creep import CreepRate

__all__ = ["CorrectionStage", "DerivedStage", "Note"]

#: on_note(kind, channel, detail, persist): an event for the service to record, and fields for
#: StateStore.update(device, channel, **persist) (empty: nothing to persist).
Note = Callable[[str, str, dict, dict], None]


@dataclass
class _Thermal:
    col: int
    name: str
    tcol: int
    mode: str
    coeffs: np.ndarray | None
    gf_ref: float
    gf_used: float
    alpha: float
    t_ref_c: float
    t_zero_c: float = float("nan")
    app_zero: float = float("nan")


class CorrectionStage:
    """Thermal output, gauge factor drift and transverse corrections of measured gauges."""

    def __init__(self, channels: Sequence[Mapping[str, Any]], notify: Callable[[], Note | None]):
        names = [c["name"] for c in channels]
        self.notify = notify
        self.thermal: list[_Thermal] = []
        self.pairs: list[tuple[int, int, float]] = []
        for i, ch in enumerate(channels):
            if ch["sensor"] != "strain_gauge":
                continue
            th = ch.get("thermal")
            if th and th["temperature_channel"] is not None and (
                    th["compensation"] == "software" or th["gf_alpha_per_c"] != 0):
                out = th["thermal_output"] if th["compensation"] == "software" else None
                self.thermal.append(_Thermal(
                    col=i, name=ch["name"], tcol=names.index(th["temperature_channel"]),
                    mode=th["compensation"],
                    coeffs=None if out is None else np.asarray(out["coefficients"], float),
                    gf_ref=float(out["gauge_factor_ref"]) if out else float(ch["gauge_factor"]),
                    gf_used=float(ch["gauge_factor"]), alpha=float(th["gf_alpha_per_c"]),
                    t_ref_c=float(th["gf_ref_temp_c"])))
            tv = ch.get("transverse")
            if tv:
                j = names.index(tv["pair"])
                if i < j:
                    self.pairs.append((i, j, float(tv["kt"])))
        self.temp_cols = sorted({t.tcol for t in self.thermal})
        self.last_temperature_c: dict[int, float] = {}

    @property
    def active(self) -> bool:
        return bool(self.thermal or self.pairs)

    def entry(self, col: int) -> _Thermal | None:
        for t in self.thermal:
            if t.col == col:
                return t
        return None

    def set_temperature_zero(self, col: int, t_zero_c: float | None) -> None:
        t = self.entry(col)
        if t is None or t.coeffs is None:
            return
        if t_zero_c is None or not math.isfinite(t_zero_c):
            t.t_zero_c = t.app_zero = float("nan")
            return
        t.t_zero_c = float(t_zero_c)
        t.app_zero = float(thermal.apparent_strain_microstrain(t.t_zero_c, t.coeffs, t.gf_ref,
                                                               t.gf_used))

    def temperature_for(self, col: int) -> float | None:
        """Mean temperature (degC) of the gauge's temperature channel over the last block."""
        t = self.entry(col)
        if t is None:
            return None
        v = self.last_temperature_c.get(t.tcol)
        return None if v is None or not math.isfinite(v) else v

    def step_factor(self, col: int) -> float:
        """d(corrected value)/d(uncorrected value) of gauge `col` for a change of its own reading
        at the last block's temperature: GF / GF(T) times the transverse pair factor
        (1 - nu0 Kt) / (1 - Kt^2). The thermal output term is additive and drops out of steps."""
        f = 1.0
        t = self.entry(col)
        if t is not None and t.alpha != 0.0:
            temp = self.last_temperature_c.get(t.tcol)
            if temp is not None:
                f /= 1.0 + t.alpha * (temp - t.t_ref_c)
        for a, b, kt in self.pairs:
            if col in (a, b):
                f *= (1.0 - thermal.NU0_ASTM_E251 * kt) / (1.0 - kt * kt)
        return f

    def apply(self, values: np.ndarray, quality: np.ndarray) -> None:
        for tc in self.temp_cols:
            col = values[:, tc]
            fin = np.isfinite(col)
            if fin.any():
                self.last_temperature_c[tc] = float(col[fin].mean())
        for t in self.thermal:
            if t.coeffs is not None and not math.isfinite(t.t_zero_c):
                first = self.last_temperature_c.get(t.tcol)
                if first is not None:
                    self.set_temperature_zero(t.col, first)
                    note = self.notify()
                    if note is not None:
                        note("thermal_reference", t.name,
                             {"temperature_at_zero_c": first,
                              "reason": "no tare with a temperature yet: the mean "
                                        "temperature of the first block is the reference"},
                             {"temperature_at_zero_c": first})
        # gauges on one temperature channel with one data sheet and one GF(T) coefficient are
        # corrected together: the thermal output polynomial and the GF(T) factor are computed
        # once per block for the group, then applied to all its columns in one operation
        for (tcol, coeffs, gf_ref, alpha, t_ref), members in self._groups().items():
            temp = values[:, tcol]
            cols = np.fromiter((t.col for t in members), dtype=np.intp, count=len(members))
            block = values[:, cols]
            if coeffs is not None:
                poly = thermal.apparent_strain_microstrain(temp, coeffs, gf_ref, gf_ref)
                scale = np.fromiter((gf_ref / t.gf_used for t in members), dtype=np.float64,
                                    count=len(members))
                zero = np.fromiter((t.app_zero for t in members), dtype=np.float64,
                                   count=len(members))
                block = block - (poly[:, None] * scale - zero)
            if alpha != 0.0:
                drift = thermal.correct_gauge_factor_drift(np.ones_like(temp), temp, 1.0, 1.0,
                                                           alpha, t_ref)
                block = block * drift[:, None]
            values[:, cols] = block
            quality[:, cols] |= quality[:, tcol][:, None]
        for a, b, kt in self.pairs:
            ea, eb = thermal.correct_pair(values[:, a], values[:, b], kt)
            values[:, a] = ea
            values[:, b] = eb
            q = quality[:, a] | quality[:, b]
            quality[:, a] = q
            quality[:, b] = q

    def _groups(self) -> dict[tuple, list[_Thermal]]:
        """Thermal entries grouped by (temperature column, coefficients, GF_ref, alpha, T_ref)."""
        groups = getattr(self, "_group_cache", None)
        if groups is None:
            groups = {}
            for t in self.thermal:
                coeffs = None if t.coeffs is None else tuple(float(c) for c in t.coeffs)
                key = (t.tcol, coeffs, t.gf_ref if coeffs is not None else 1.0, t.alpha,
                       t.t_ref_c if t.alpha != 0.0 else 0.0)
                groups.setdefault(key, []).append(t)
            self._group_cache = groups
        return groups

    def attrs(self, col: int) -> dict[str, Any]:
        t = self.entry(col)
        out: dict[str, Any] = {}
        if t is not None and t.coeffs is not None:
            out["temperature_at_zero_c"] = t.t_zero_c
        return out


@dataclass
class _Derived:
    cfg: Mapping[str, Any]
    inputs: list[int]
    first_col: int
    n_out: int
    rate: CreepRate | None = None
    reference: float = float("nan")
    last_t_ns: int | None = None
    attrs: dict = field(default_factory=dict)


class DerivedStage:
    """Derived columns of one device, computed per block after the measured (corrected) ones.

    measured:  names of the measured columns (in column order).
    has_zero:  has_zero(col) tells whether a measured column has its zero (creep 'first'
               waits for it when the gauge takes one at start).
    """

    def __init__(self, device: Mapping[str, Any], measured: Sequence[str],
                 has_zero: Callable[[int], bool], notify: Callable[[], Note | None]):
        self.device = device
        self.has_zero = has_zero
        self.notify = notify
        self.m = len(measured)
        cols = {n: i for i, n in enumerate(measured)}
        self.entries: list[_Derived] = []
        self.names: list[str] = []
        self.units: list[str] = []
        self.quantities: list[str] = []
        chans = {c["name"]: c for c in device["channels"]}
        col = self.m
        for d in device.get("derived") or []:
            outs = derived_outputs(d)
            e = _Derived(d, [cols[n] for n in derived_inputs(d)], col, len(outs))
            e.attrs = _entry_attrs(d)
            if d["kind"] == "creep":
                e.rate = CreepRate(float(d["window_s"]))
                if d["reference"] == "tare":
                    e.reference = 0.0
                gauge = chans.get(d["gauge"])
                e.attrs["waits_for_tare"] = bool(gauge and gauge["tare"]["at_start"])
            for n, u, q in outs:
                cols[n] = col
                self.names.append(n)
                self.units.append(u)
                self.quantities.append(q)
                col += 1
            self.entries.append(e)
        self.k = col

    def restore(self, name: str, reference: float | None) -> None:
        """The persisted creep reference of entry `name` (reference: first)."""
        for e in self.entries:
            if e.cfg["name"] == name and e.cfg["kind"] == "creep" and reference is not None \
                    and e.cfg["reference"] == "first" and math.isfinite(reference):
                e.reference = float(reference)

    def apply(self, times_ns: np.ndarray, values: np.ndarray, quality: np.ndarray) -> None:
        """Fill columns m..k of values/quality (n, k) from the columns before them."""
        for e in self.entries:
            kind = e.cfg["kind"]
            x = values[:, e.inputs]
            q = np.bitwise_or.reduce(quality[:, e.inputs], axis=1)
            out = values[:, e.first_col:e.first_col + e.n_out]
            if kind == "rosette":
                ex, ey, gxy = rosette.strain_tensor_from_gauges(x, e.cfg["angles_deg"], e.cfg["kt"])
                e1, e2, th, gm = rosette.principal(ex, ey, gxy)
                out[:, 0], out[:, 1], out[:, 2], out[:, 3] = e1, e2, th, gm
                mat = e.cfg.get("material")
                if mat:
                    s1, s2 = rosette.principal_stresses(e1, e2, mat["e_mpa"], mat["poisson"])
                    out[:, 4], out[:, 5] = s1, s2
                    out[:, 6] = rosette.von_mises(s1, s2)
                    out[:, 7] = rosette.tresca(s1, s2)
            elif kind == "uniaxial_stress":
                out[:, 0] = rosette.uniaxial_stress(x[:, 0], e.cfg["e_mpa"])
            elif kind == "creep":
                self._creep(e, times_ns, x[:, 0], quality[:, e.inputs[0]], out)
            quality[:, e.first_col:e.first_col + e.n_out] = q[:, None]

    def _creep(self, e: _Derived, times_ns: np.ndarray, v: np.ndarray, q: np.ndarray,
               out: np.ndarray) -> None:
        if not math.isfinite(e.reference):
            ready = not e.attrs["waits_for_tare"] or self.has_zero(e.inputs[0])
            usable = np.isfinite(v) & ((q & np.uint8(Quality.SHUNT_ON)) == 0)
            if ready and usable.any():
                i = int(np.argmax(usable))
                e.reference = float(v[i])
                note = self.notify()
                if note is not None:
                    note("creep_reference", e.cfg["name"],
                         {"gauge": e.cfg["gauge"], "reference_microstrain": e.reference,
                          "sample_time_ns": int(times_ns[i])},
                         {"extra": {"creep_reference_microstrain": e.reference,
                                    "creep_reference_ns": int(times_ns[i])}})
        out[:, 0] = v - e.reference
        assert e.rate is not None
        if len(times_ns) and e.last_t_ns is not None and int(times_ns[0]) < e.last_t_ns:
            e.rate.reset()  # time went back (clock stepped across a reconnect): a new window
            note = self.notify()
            if note is not None:
                note("creep_rate_reset", e.cfg["name"],
                     {"reason": "sample time went back", "last_ns": e.last_t_ns,
                      "first_ns": int(times_ns[0])}, {})
        y = np.where((q & np.uint8(Quality.SHUNT_ON)) == 0, v, np.nan)
        out[:, 1] = e.rate.update(times_ns, y)
        if len(times_ns):
            e.last_t_ns = int(times_ns[-1])

    def column_attrs(self) -> list[dict[str, Any]]:
        """Per derived column: what it is, from what, with which parameters."""
        out = []
        for e in self.entries:
            a = dict(e.attrs)
            a.pop("waits_for_tare", None)
            if e.cfg["kind"] == "creep" and e.cfg["reference"] == "first":
                a["creep_reference_microstrain"] = e.reference
            out += [dict(a) for _ in range(e.n_out)]
        return out


def _entry_attrs(d: Mapping[str, Any]) -> dict[str, Any]:
    a: dict[str, Any] = {"derived_kind": d["kind"], "derived_name": d["name"],
                         "inputs": ",".join(derived_inputs(d)),
                         "description": d.get("description", "")}
    if d["kind"] == "rosette":
        a["angles_deg"] = ",".join(f"{x:g}" for x in d["angles_deg"])
        a["kt"] = float(d["kt"])
        if d.get("material"):
            a["e_mpa"] = float(d["material"]["e_mpa"])
            a["poisson"] = float(d["material"]["poisson"])
    elif d["kind"] == "uniaxial_stress":
        a["e_mpa"] = float(d["e_mpa"])
    elif d["kind"] == "creep":
        a["window_s"] = float(d["window_s"])
        a["reference"] = d["reference"]
    return a
