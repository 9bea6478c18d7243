"""The simulated 24-bit bridge converter (``simulated-bridge``): a test instrument, not a toy.

Each channel follows a scripted *truth* (constant, steps, ramp, sine or a three-stage creep
curve) that passes through the same physics a real installation has:

    truth -> gauge law (dR/R = GF eps + GF2 eps^2) -> four arm resistances with lead and
    completion resistors and an optional shunt -> divider voltages of both bridge halves
    -> excitation, PGA gain and reference -> white noise, mains pickup and drift (nV/V)
    -> rounding to signed 24-bit codes, clipped to the two saturation codes.

The bridge equations here are written out independently of the service's converter
(``straind.bridge``) on purpose: the converter is tested against this simulator, so the two
must not share a code path.

`BridgeSimulator` is the pure generator: its output is a function of the configuration, the
seed and the sample index only: noise comes in fixed pages of `PAGE_SAMPLES` samples per
channel, page p of a channel being drawn from a PCG64 stream seeded by (seed, channel index)
and advanced by p * 2**40 draws, so any block size and any order of requests give the same
samples. Its shunt switches are scheduled by sample index too. The serial
virtual front-end reuses it to serve frames. `SimulatedBridge` wraps it as a `Driver`.

Arm convention (the project's): Vo/Vex = R1/(R1+R2) - R4/(R3+R4); arms 1 and 3 add, 2 and 4
subtract. As a network: excitation + at node A, - at node C; R2 from A to B, R1 from B to C,
R3 from A to D, R4 from D to C; Vo = V(B) - V(D).

Device options (``devices[].options``), with units:

    seed                  int >= 0, default 0. Same seed, same samples.
    noise_nv_per_v        white Gaussian noise, RMS, nV/V of excitation (default 20).
    mains_hz              0, 50 or 60 (default 50): frequency of the mains pickup.
    mains_nv_per_v        mains pickup, peak amplitude in nV/V (default 0 = none); the same
                          field reaches every channel, with one fixed phase set by the seed.
    drift_nv_per_v_per_h  zero drift of the front-end, nV/V per hour of sample-clock time
                          (default 0); it follows the sample clock, not truth time.
    time_scale            truth time runs this many times faster than the sample clock
                          (default 1), so a creep curve of weeks shows in a minute.
    open_bridge_channels  names of channels whose bridge is open: their codes sit at the
                          positive rail (8388607) flagged OPEN_BRIDGE | SATURATED.
    realtime              bool, default true: pace blocks to the host's monotonic clock;
                          false delivers blocks as fast as they are asked for.
    fifo_s                seconds of samples the simulated converter buffers when the reader
                          falls behind in realtime mode (default 0 = unlimited). Older samples
                          are lost: the sample counter jumps and the first sample after the
                          loss carries AFTER_GAP, so the service's gap path can be exercised.

Channel options (``devices[].channels[].options``):

    truth                 required mapping, ``kind`` one of constant, steps, ramp, sine, creep;
                          values in the channel's unit (microstrain for strain gauges, the
                          transducer's ``unit`` for bridge transducers), times in s of truth
                          time (sample time x time_scale):
        constant:  value
        steps:     levels [..]; either step_s (each level lasts step_s; repeat: bool cycles
                   the list) or times_s [..] (start time of each level, increasing; before
                   the first the value is ``initial``, default 0)
        ramp:      start (default 0), rate_per_s, start_s (default 0; start before it),
                   until_s (optional; held after it)
        sine:      offset (default 0), amplitude, frequency_hz, phase_deg (default 0)
        creep:     (strain gauges only, microstrain) 0 before load_at_s (default 0), then
                   elastic_microstrain
                   + primary_microstrain * (1 - exp(-(t - load_at_s) / primary_tau_s))
                   + secondary_microstrain_per_h * (t - load_at_s) / 3600
                   + tertiary_microstrain * (exp((t - tertiary_onset_s) / tertiary_tau_s) - 1)
                     for t > tertiary_onset_s (absolute truth time; omit for no tertiary
                     stage; the exponent is capped at 60);
                   rupture_s (optional, absolute truth time): the gauge breaks and the
                   channel reads as an open bridge from then on.
    true_gauge_factor     the gauge's real gauge factor when it differs from the configured one.
    true_gauge_factor2    quadratic gauge coefficient (dR/R = GF eps + GF2 eps^2); default the
                          configured gauge_factor_2 (0 when absent).
    thermal_output_microstrain  [A0..A4]: the gauge's thermal output eps_app(T) in microstrain
                          (T in degC) as indicated at its own gauge factor; with temperature_from
                          it is added to the strain truth before the bridge model.
    temperature_from      name of a temperature channel (rtd or thermocouple) of this device whose
                          truth is the gauge temperature (for thermal_output_microstrain and
                          gf_alpha_per_c).
    gf_alpha_per_c        temperature coefficient of the real gauge factor (1/degC, default 0):
                          GF(T) = GF (1 + alpha (T - gf_ref_temp_c)), applied to the mechanical
                          strain; gf_ref_temp_c default 24 degC.
    true_lead_ohm         the real resistance of each lead wire, ohm.
    gauge_ohm_offset      ohm added to the unstrained resistance of the first gauge arm, or a
                          list of four (one per arm, completion arms included): an initial
                          imbalance that tare removes.
    lead_arms             list of four lead counts, one per arm, overriding the lead placement
                          below (for wiring the configuration cannot express).
    true_excitation_v     the excitation really delivered, V; cancels with a ratiometric
                          reference, scales the codes with an external one.
    zero_offset_mv_per_v  extra output offset, mV/V (a transducer's zero balance).
    true_rated_output_mv_per_v  a transducer's real sensitivity, mV/V at capacity.
    bridge_ohm            arm resistance of a bridge transducer (for its shunt), default 350.
    noise_nv_per_v        this channel's noise RMS, nV/V, instead of the device's.

Temperature channels (``sensor: rtd`` / ``thermocouple``): the truth is in degC (kinds
constant, steps, ramp, sine; not creep), clipped into the sensor function's range.
RTD: R = Callendar-Van Dusen R(T) of the element (straind.temperature's forward function) plus
2 RL for a 2-wire connection (3- and 4-wire connections compensate the leads); the input is
R / reference_ohm (full scale = reference_ohm), code = input x 2**23 x gain.
Thermocouple: emf = E(T) - E(T_junction) (ITS-90 reference functions), T_junction from the truth
of the ``junction_channel`` or the fixed ``junction_c``; the input is emf / vref_v.
For both, the noise (nV/V), mains pickup and drift are relative to the converter reference.
Each channel may set its own ``gain``, ``reference`` and ``vref_v`` (else the adc section's).

Lead placement (RL = lead resistance, the project's convention): quarter 2-wire: 2 RL in arm 1;
quarter 3-wire: RL in arms 1 and 2; half-bending / half-poisson: 2-wire 2 RL in arms 1 and 2,
3-wire RL in arms 1 and 2; half-opposite: 2-wire 2 RL in arms 1 and 3, 3-wire RL in arms 1 and
3; full bridges: none (the ratio is taken against the sensed excitation). Custom: 2-wire 2 RL in
every active arm (k != 0); 3-wire RL in both arms of each bridge half that holds an active arm;
a custom bridge with four active arms is treated as a full bridge (no leads).

A shunt (``shunt: {ohm, arm}``) is put in parallel with the whole arm, leads included. A bridge
transducer is modelled as a full bridge of ``bridge_ohm`` arms (x, -x, x, -x), whose ratio is
exactly x, so its shunt has a real effect too.
"""

from __future__ import annotations

import math
import threading
import time
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from straind.block import CODE_MAX, CODE_MIN, Block, Quality
from straind.drivers.base import (
    ChannelSetup,
    DeviceSetup,
    Driver,
    DriverConfigError,
    DriverInfo,
    DriverIOError,
    NotSupported,
)
from straind.schema import ConfigError, Field, ListOf, Section, line_of, validate
from straind import temperature as _temperature

__all__ = [
    "PAGE_SAMPLES",
    "BridgeSimulator",
    "SimulatedBridge",
    "ShuntNotConfigured",
    "TRUTH_KINDS",
    "SIM_OPTION_FIELDS",
    "CHANNEL_OPTIONS",
]

#: Noise is drawn in pages of this many samples per channel, each seeded by
#: (seed, channel index, page number), so it does not depend on block sizes.
PAGE_SAMPLES = 4096
#: Codes per unit of (gain x input / reference): 2**23.
FULL_SCALE_CODES = float(1 << 23)
#: Largest exponent of the tertiary creep term (exp(60) is already far beyond any full scale).
_MAX_TERTIARY_EXPONENT = 60.0
#: Bounds on dR/R (and on a transducer's ratio) that keep every resistance positive and finite.
_X_MIN, _X_MAX = -0.9, 1.0e3
_X_MIN_TRANSDUCER, _X_MAX_TRANSDUCER = -0.999, 0.999


class ShuntNotConfigured(NotSupported, DriverConfigError):
    """set_shunt() on a channel whose configuration has no ``shunt`` section."""


# ------------------------------------------------------------------------------------------
# option schemas
# ------------------------------------------------------------------------------------------

def _number_list(min_items: int = 1, length: int | None = None) -> Callable[[Any, str, Any], list]:
    """A Field kind: a list of finite numbers (booleans refused)."""

    def check(value: Any, path: str, line: int | None) -> list[float]:
        if not isinstance(value, list):
            raise ConfigError(path, f"expected a list of numbers, got {value!r}", line)
        if length is not None and len(value) != length:
            raise ConfigError(path, f"expected {length} numbers, got {len(value)}", line)
        if len(value) < min_items:
            raise ConfigError(path, f"needs at least {min_items} number(s)", line)
        out = []
        for i, v in enumerate(value):
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise ConfigError(f"{path}[{i}]", f"expected a finite number, got {v!r}",
                                  line_of(value, i) or line)
            out.append(float(v))
        return out

    return check


def _check_steps(out: dict, path: str, source: Any) -> None:
    if (out["step_s"] is None) == (out["times_s"] is None):
        raise ConfigError(path, "give exactly one of step_s or times_s", line_of(source))
    if out["times_s"] is not None:
        times = out["times_s"]
        if len(times) != len(out["levels"]):
            raise ConfigError(f"{path}.times_s", f"needs one time per level ({len(out['levels'])}),"
                              f" got {len(times)}", line_of(source, "times_s"))
        if any(b <= a for a, b in zip(times, times[1:])):
            raise ConfigError(f"{path}.times_s", "times must increase", line_of(source, "times_s"))
        if out["repeat"]:
            raise ConfigError(f"{path}.repeat", "repeat works with step_s only",
                              line_of(source, "repeat"))


def _check_ramp(out: dict, path: str, source: Any) -> None:
    if out["until_s"] is not None and out["until_s"] <= out["start_s"]:
        raise ConfigError(f"{path}.until_s", "must be later than start_s", line_of(source, "until_s"))


def _kind_field() -> Field:
    return Field(str, doc="truth scenario kind")


#: One schema per truth kind (units: the channel's unit, times in s of truth time).
TRUTH_KINDS: dict[str, Section] = {
    "constant": Section({
        "kind": _kind_field(),
        "value": Field(float, doc="constant truth value", unit="channel unit"),
    }),
    "steps": Section({
        "kind": _kind_field(),
        "levels": Field(_number_list(1), doc="successive truth levels", unit="channel unit"),
        "step_s": Field(float, None, nullable=True, min=0.0, min_exclusive=True,
                        doc="duration of each level", unit="s"),
        "times_s": Field(_number_list(1), None, nullable=True,
                         doc="start time of each level", unit="s"),
        "initial": Field(float, 0.0, doc="value before times_s[0]", unit="channel unit"),
        "repeat": Field(bool, False, doc="cycle the levels (with step_s)"),
    }, check=_check_steps),
    "ramp": Section({
        "kind": _kind_field(),
        "start": Field(float, 0.0, doc="value at start_s", unit="channel unit"),
        "rate_per_s": Field(float, doc="slope", unit="channel unit per s"),
        "start_s": Field(float, 0.0, min=0.0, doc="ramp begins", unit="s"),
        "until_s": Field(float, None, nullable=True, doc="ramp stops and holds", unit="s"),
    }, check=_check_ramp),
    "sine": Section({
        "kind": _kind_field(),
        "offset": Field(float, 0.0, unit="channel unit"),
        "amplitude": Field(float, doc="peak amplitude", unit="channel unit"),
        "frequency_hz": Field(float, min=0.0, unit="Hz"),
        "phase_deg": Field(float, 0.0, unit="degree"),
    }),
    "creep": Section({
        "kind": _kind_field(),
        "load_at_s": Field(float, 0.0, min=0.0, doc="load applied", unit="s"),
        "elastic_microstrain": Field(float, doc="strain on loading", unit="microstrain"),
        "primary_microstrain": Field(float, 0.0, doc="primary (transient) creep amplitude",
                                     unit="microstrain"),
        "primary_tau_s": Field(float, 3600.0, min=0.0, min_exclusive=True,
                               doc="primary time constant", unit="s"),
        "secondary_microstrain_per_h": Field(float, 0.0, doc="steady creep rate",
                                             unit="microstrain/h"),
        "tertiary_microstrain": Field(float, 0.0, doc="tertiary creep scale", unit="microstrain"),
        "tertiary_onset_s": Field(float, None, nullable=True, doc="tertiary creep begins", unit="s"),
        "tertiary_tau_s": Field(float, 3600.0, min=0.0, min_exclusive=True,
                                doc="tertiary growth time constant", unit="s"),
        "rupture_s": Field(float, None, nullable=True, doc="gauge breaks (open bridge)", unit="s"),
    }),
}


def _check_truth(value: Any, path: str, line: int | None) -> dict:
    """Field kind for ``options.truth``: a mapping validated by the schema of its ``kind``."""
    if not isinstance(value, dict):
        raise ConfigError(path, f"expected a mapping with a 'kind' key, got {value!r}", line)
    if "kind" not in value:
        raise ConfigError(f"{path}.kind", "required key is missing (one of "
                          + ", ".join(TRUTH_KINDS) + ")", line_of(value) or line)
    kind = value["kind"]
    if kind not in TRUTH_KINDS:
        raise ConfigError(f"{path}.kind", "must be one of " + ", ".join(repr(k) for k in TRUTH_KINDS)
                          + f", got {kind!r}", line_of(value, "kind") or line)
    return validate(TRUTH_KINDS[kind], value, path, line)


def _check_ohm_offset(value: Any, path: str, line: int | None) -> float | list[float]:
    if isinstance(value, list):
        return _number_list(4, 4)(value, path, line)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ConfigError(path, f"expected a number of ohm or a list of four, got {value!r}", line)
    return float(value)


def _check_lead_arms(value: Any, path: str, line: int | None) -> list[float]:
    out = _number_list(4, 4)(value, path, line)
    if any(v < 0 for v in out):
        raise ConfigError(path, "lead counts must be >= 0", line)
    return out


#: Device options that shape the simulated signal (also accepted by `BridgeSimulator`).
SIM_OPTION_FIELDS: dict[str, Field] = {
    "seed": Field(int, 0, min=0, doc="random seed: same seed, same samples"),
    "noise_nv_per_v": Field(float, 20.0, min=0.0, doc="white noise RMS", unit="nV/V"),
    "mains_hz": Field(float, 50.0, choices=[0.0, 50.0, 60.0], doc="mains frequency", unit="Hz"),
    "mains_nv_per_v": Field(float, 0.0, min=0.0, doc="mains pickup peak amplitude", unit="nV/V"),
    "drift_nv_per_v_per_h": Field(float, 0.0, doc="zero drift (sample-clock time)", unit="nV/V/h"),
    "time_scale": Field(float, 1.0, min=0.0, min_exclusive=True,
                        doc="truth time per sample-clock time"),
    "open_bridge_channels": ListOf(Field(str), default=[], doc="channels with an open bridge"),
}

_SIM_OPTIONS = Section(dict(SIM_OPTION_FIELDS), open_keys=True)

#: Per-channel options (``devices[].channels[].options``).
CHANNEL_OPTIONS = Section({
    "truth": Field(_check_truth, doc="truth scenario (kind + parameters)"),
    "true_gauge_factor": Field(float, None, nullable=True, doc="real gauge factor"),
    "true_gauge_factor2": Field(float, None, nullable=True,
                                doc="quadratic gauge coefficient (per strain^2); default as configured"),
    "thermal_output_microstrain": Field(_number_list(1), None, nullable=True,
                                        doc="thermal output A0..A4 (T in degC)", unit="microstrain"),
    "temperature_from": Field(str, None, nullable=True,
                              doc="temperature channel whose truth is the gauge temperature"),
    "gf_alpha_per_c": Field(float, 0.0, doc="temperature coefficient of the real gauge factor",
                            unit="1/degC"),
    "gf_ref_temp_c": Field(float, 24.0, doc="temperature of the stated gauge factor", unit="degC"),
    "true_lead_ohm": Field(float, None, nullable=True, min=0.0, doc="real lead resistance",
                           unit="ohm"),
    "gauge_ohm_offset": Field(_check_ohm_offset, 0.0, doc="unstrained resistance offset",
                              unit="ohm"),
    "lead_arms": Field(_check_lead_arms, None, nullable=True, doc="leads in series per arm"),
    "true_excitation_v": Field(float, None, nullable=True, min=0.0, min_exclusive=True,
                               doc="excitation really delivered", unit="V"),
    "zero_offset_mv_per_v": Field(float, 0.0, doc="output offset", unit="mV/V"),
    "true_rated_output_mv_per_v": Field(float, None, nullable=True, doc="real transducer "
                                        "sensitivity", unit="mV/V"),
    "bridge_ohm": Field(float, 350.0, min=0.0, min_exclusive=True,
                        doc="transducer arm resistance", unit="ohm"),
    "noise_nv_per_v": Field(float, None, nullable=True, min=0.0, doc="channel noise RMS",
                            unit="nV/V"),
})


def _validated(spec: Any, value: Any, path: str) -> Any:
    """schema.validate, with a ConfigError turned into a DriverConfigError (same path)."""
    try:
        return validate(spec, value, path)
    except DriverConfigError:
        raise
    except ConfigError as exc:
        raise DriverConfigError(exc.path, exc.reason, exc.line) from None


# ------------------------------------------------------------------------------------------
# bridge geometry (the simulator's own tables)
# ------------------------------------------------------------------------------------------

#: dR/R multipliers per arm for each named bridge (x = GF eps); "nu" means -poisson.
_ARM_MULTIPLIERS: dict[str, tuple[Any, Any, Any, Any]] = {
    "quarter": (1.0, 0.0, 0.0, 0.0),
    "half-bending": (1.0, -1.0, 0.0, 0.0),
    "half-poisson": (1.0, "nu", 0.0, 0.0),
    "half-opposite": (1.0, 0.0, 1.0, 0.0),
    "full-bending": (1.0, -1.0, 1.0, -1.0),
    "full-poisson": (1.0, "nu", 1.0, "nu"),
}
#: Which arms hold a gauge (the others are completion resistors).
_GAUGE_ARMS: dict[str, tuple[bool, bool, bool, bool]] = {
    "quarter": (True, False, False, False),
    "half-bending": (True, True, False, False),
    "half-poisson": (True, True, False, False),
    "half-opposite": (True, False, True, False),
    "full-bending": (True, True, True, True),
    "full-poisson": (True, True, True, True),
}
#: Lead resistances in series with each arm, per bridge and wiring.
_LEADS: dict[tuple[str, str], tuple[float, float, float, float]] = {
    ("quarter", "2-wire"): (2, 0, 0, 0),
    ("quarter", "3-wire"): (1, 1, 0, 0),
    ("half-bending", "2-wire"): (2, 2, 0, 0),
    ("half-bending", "3-wire"): (1, 1, 0, 0),
    ("half-poisson", "2-wire"): (2, 2, 0, 0),
    ("half-poisson", "3-wire"): (1, 1, 0, 0),
    ("half-opposite", "2-wire"): (2, 0, 2, 0),
    ("half-opposite", "3-wire"): (1, 0, 1, 0),
}


def _custom_leads(active: Sequence[bool], wiring: str) -> tuple[float, ...]:
    if all(active):
        return (0.0, 0.0, 0.0, 0.0)
    if wiring == "2-wire":
        return tuple(2.0 if a else 0.0 for a in active)
    left = 1.0 if (active[0] or active[1]) else 0.0
    right = 1.0 if (active[2] or active[3]) else 0.0
    return (left, left, right, right)


class _CertificateInverse:
    """Ratio (V/V) for a transducer value through the inverse of its certificate polynomial.

    The certificate polynomial (value as a function of mV/V, least squares of the given degree)
    is inverted with a table lookup for the start and a few vectorised Newton steps.
    """

    def __init__(self, points: Sequence[Sequence[float]], degree: int, path: str):
        pts = np.asarray(points, dtype=np.float64)
        if pts.ndim != 2 or pts.shape[1] != 2 or pts.shape[0] < degree + 1:
            raise DriverConfigError(f"{path}.points", f"need at least {degree + 1} "
                                    "[mv_per_v, value] pairs for degree {degree}")
        self.coef = np.polynomial.polynomial.polyfit(pts[:, 0], pts[:, 1], degree)
        self.dcoef = np.polynomial.polynomial.polyder(self.coef)
        lo, hi = float(pts[:, 0].min()), float(pts[:, 0].max())
        span = hi - lo
        if span <= 0:
            raise DriverConfigError(f"{path}.points", "points must span a range of mV/V")
        grid = np.linspace(lo - span, hi + span, 4097)
        vals = np.polynomial.polynomial.polyval(grid, self.coef)
        steps = np.diff(vals)
        if not (np.all(steps > 0) or np.all(steps < 0)):
            raise DriverConfigError(path, "certificate polynomial is not monotonic over three "
                                    "times the span of its points: it cannot be inverted")
        if steps[0] < 0:
            grid, vals = grid[::-1], vals[::-1]
        self.grid, self.vals = grid, vals
        self.mv_lo, self.mv_hi = float(grid.min()), float(grid.max())

    def ratio(self, value: np.ndarray) -> np.ndarray:
        mv = np.interp(value, self.vals, self.grid)
        for _ in range(4):
            f = np.polynomial.polynomial.polyval(mv, self.coef) - value
            d = np.polynomial.polynomial.polyval(mv, self.dcoef)
            mv = np.clip(mv - f / np.where(d == 0.0, 1.0, d), self.mv_lo, self.mv_hi)
        return mv * 1e-3


# ------------------------------------------------------------------------------------------
# the generator
# ------------------------------------------------------------------------------------------

class BridgeSimulator:
    """Pure generator of converter codes for a device setup: same inputs, same samples.

    setup:   channel configurations (sensor, bridge, resistances, excitation ...) and the
             device ``adc`` section (gain, reference, vref_v) in ``setup.config["adc"]``.
    options: the device options (see the module docstring); unknown keys are ignored here.
    path:    key path of the device, used in configuration error messages.

    codes() and truth() may be called in any order and with any sizes; codes() is not meant to
    be called from two threads at once, set_shunt() may be called from any thread.
    """

    def __init__(self, setup: DeviceSetup, options: Mapping[str, Any], path: str = "device"):
        self.setup = setup
        self.path = path
        opts = _validated(_SIM_OPTIONS, dict(options), f"{path}.options")
        self.options = opts
        m = len(setup.channels)
        if m < 1:
            raise DriverConfigError(f"{path}.channels", "needs at least one channel")
        self.n_channels = m
        self.names = tuple(ch.name for ch in setup.channels)
        self._col_of = {ch.index: col for col, ch in enumerate(setup.channels)}
        self.seed = int(opts["seed"])
        self._period_ns = setup.period_ns
        self._period_s = self._period_ns * 1e-9
        self._truth_dt_s = self._period_s * float(opts["time_scale"])
        self._lock = threading.Lock()
        self._pages: dict[int, np.ndarray] = {}
        self._high_water = 0
        self._shunt_events: dict[int, list[tuple[int, bool]]] = {}

        adc = dict(setup.config.get("adc") or {})
        gain = adc.get("gain")
        if gain is None:
            raise DriverConfigError(f"{path}.adc.gain", "required key is missing")
        self.gain = float(gain)
        reference = adc.get("reference", "excitation")
        if reference not in ("excitation", "external"):
            raise DriverConfigError(f"{path}.adc.reference",
                                    f"must be 'excitation' or 'external', got {reference!r}")
        vref_v = adc.get("vref_v")
        if reference == "external" and not (isinstance(vref_v, (int, float)) and vref_v > 0):
            raise DriverConfigError(f"{path}.adc.vref_v", "an external reference needs vref_v > 0 V")

        open_names = list(opts["open_bridge_channels"])
        for j, name in enumerate(open_names):
            if name not in self.names:
                raise DriverConfigError(f"{path}.options.open_bridge_channels[{j}]",
                                        f"no channel named {name!r}")

        # per-channel constants: R_arm = A + B * x, x = dR/R (gauges) or ratio (transducers)
        self._A = np.zeros((4, m))
        self._B = np.zeros((4, m))
        self._shunt_g = np.zeros((4, m))          # siemens of the configured shunt, by arm
        self._has_shunt = np.zeros(m, dtype=bool)
        self._is_gauge = np.zeros(m, dtype=bool)
        self._x_per_truth = np.zeros(m)           # linear part: x = truth * this
        self._gf2 = np.zeros(m)                   # quadratic gauge coefficient (per strain^2)
        self._code_scale = np.zeros(m)            # codes per V/V
        self._offset = np.zeros(m)                # V/V
        self._sigma = np.zeros(m)                 # V/V RMS
        self._open = np.zeros(m, dtype=bool)
        self._cert: dict[int, _CertificateInverse] = {}
        self.units: list[str] = []
        self._truth_cfg: list[dict] = []
        self._rupture_s = np.full(m, np.inf)
        self._rtd: dict[int, tuple[float, float, float]] = {}     # col -> (r0, r_ref, lead ohm)
        self._tc: dict[int, tuple[str, Any, float]] = {}          # col -> (type, junction, vref)
        self._thermal: dict[int, dict[str, Any]] = {}             # gauge col -> thermal truth

        copts_all = []
        for col, ch in enumerate(setup.channels):
            cpath = f"{path}.channels[{col}]"
            copts = _validated(CHANNEL_OPTIONS, dict(ch.options), f"{cpath}.options")
            cfg = ch.config
            ch_gain = cfg.get("gain") or gain
            ch_ref = cfg.get("reference") or reference
            ch_vref = cfg.get("vref_v") if cfg.get("vref_v") is not None else vref_v
            if ch_ref not in ("excitation", "external"):
                raise DriverConfigError(f"{cpath}.reference",
                                        f"must be 'excitation' or 'external', got {ch_ref!r}")
            if ch_ref == "external" and not (isinstance(ch_vref, (int, float)) and ch_vref > 0):
                raise DriverConfigError(f"{cpath}.vref_v", "an external reference needs vref_v > 0 V")
            self._setup_channel(col, cfg, copts, cpath, ch_ref, ch_vref, float(ch_gain))
            self._open[col] = ch.name in open_names
            copts_all.append(copts)
        self._link_temperatures(copts_all, path)
        self._temp_cols = sorted(set(self._rtd) | set(self._tc))
        self._any_shunt = bool(self._has_shunt.any())
        self._any_gf2 = bool(np.any(self._gf2 != 0.0))
        self._varying_arm = [bool(np.any(self._B[a] != 0.0)) for a in range(4)]
        self._noise = bool(np.any(self._sigma > 0.0))
        self._any_offset = bool(np.any(self._offset != 0.0))
        self._x_lo = np.where(self._is_gauge, _X_MIN, _X_MIN_TRANSDUCER)
        self._x_hi = np.where(self._is_gauge, _X_MAX, _X_MAX_TRANSDUCER)
        self._x_lo_min, self._x_hi_max = float(self._x_lo.max()), float(self._x_hi.min())
        self._streams = []
        for ch in setup.channels:
            bitgen = np.random.PCG64(np.random.SeedSequence([self.seed, int(ch.index)]))
            self._streams.append((bitgen, np.random.Generator(bitgen), bitgen.state))

        self._mains_hz = int(opts["mains_hz"])
        amp = float(opts["mains_nv_per_v"]) * 1e-9
        self._mains_amp = amp if self._mains_hz else 0.0
        # one fixed, seed-dependent phase (the same mains field reaches every channel)
        self._mains_phase = 2.0 * np.pi * math.fmod(0.6180339887498949 * (self.seed + 1), 1.0)
        self._drift_per_sample = float(opts["drift_nv_per_v_per_h"]) * 1e-9 / 3600.0 * self._period_s
        self._build_truth_groups()

    # -- configuration ---------------------------------------------------------------------
    def _setup_channel(self, col: int, cfg: Mapping[str, Any], copts: Mapping[str, Any],
                       cpath: str, reference: str, vref_v: Any, gain: float) -> None:
        sensor = cfg.get("sensor", "strain_gauge")
        truth = copts["truth"]
        if sensor in ("rtd", "thermocouple"):
            self._setup_temperature(col, cfg, copts, cpath, reference, vref_v, gain)
            return
        excitation_v = cfg.get("excitation_v")
        if not isinstance(excitation_v, (int, float)) or excitation_v <= 0:
            raise DriverConfigError(f"{cpath}.excitation_v", "required: excitation in V (> 0)")
        true_exc = copts["true_excitation_v"] or float(excitation_v)
        vref = true_exc if reference == "excitation" else float(vref_v)
        self._code_scale[col] = gain * FULL_SCALE_CODES * true_exc / vref
        self._offset[col] = copts["zero_offset_mv_per_v"] * 1e-3
        noise = copts["noise_nv_per_v"]
        self._sigma[col] = (self.options["noise_nv_per_v"] if noise is None else noise) * 1e-9

        if sensor == "strain_gauge":
            self._setup_gauge(col, cfg, copts, cpath)
            self.units.append("microstrain")
        elif sensor == "bridge_transducer":
            if truth["kind"] == "creep":
                raise DriverConfigError(f"{cpath}.options.truth.kind",
                                        "creep is a strain scenario: use it on strain_gauge channels")
            self._setup_transducer(col, cfg, copts, cpath)
            self.units.append(str(cfg.get("unit", "")))
        else:
            raise DriverConfigError(f"{cpath}.sensor", f"the simulator has no {sensor!r} channels")
        self._truth_cfg.append(truth)
        if truth["kind"] == "creep" and truth["rupture_s"] is not None:
            self._rupture_s[col] = truth["rupture_s"]

        shunt = cfg.get("shunt")
        if shunt:
            ohm, arm = shunt.get("ohm"), shunt.get("arm")
            if not isinstance(ohm, (int, float)) or ohm <= 0:
                raise DriverConfigError(f"{cpath}.shunt.ohm", "shunt resistance must be > 0 ohm")
            if arm not in (1, 2, 3, 4):
                raise DriverConfigError(f"{cpath}.shunt.arm", f"must be 1..4, got {arm!r}")
            self._shunt_g[arm - 1, col] = 1.0 / float(ohm)
            self._has_shunt[col] = True

    def _setup_gauge(self, col: int, cfg: Mapping[str, Any], copts: Mapping[str, Any],
                     cpath: str) -> None:
        self._is_gauge[col] = True
        for key in ("gauge_factor", "gauge_ohm"):
            if not isinstance(cfg.get(key), (int, float)):
                raise DriverConfigError(f"{cpath}.{key}", "required for a strain gauge")
        gauge_ohm = float(cfg["gauge_ohm"])
        completion = cfg.get("completion_ohm")
        completion_ohm = gauge_ohm if completion is None else float(completion)
        bridge = cfg.get("bridge", "quarter")
        wiring = cfg.get("wiring") or "3-wire"
        if wiring not in ("2-wire", "3-wire"):
            raise DriverConfigError(f"{cpath}.wiring", f"must be 2-wire or 3-wire, got {wiring!r}")
        if bridge == "custom":
            arms = cfg.get("arms")
            if not (isinstance(arms, (list, tuple)) and len(arms) == 4):
                raise DriverConfigError(f"{cpath}.arms", "a custom bridge needs four multipliers")
            k = np.array([float(a) for a in arms])
            if not np.any(k != 0.0):
                raise DriverConfigError(f"{cpath}.arms", "at least one arm must be active")
            active = tuple(bool(a != 0.0) for a in k)
            leads = _custom_leads(active, wiring)
        elif bridge in _ARM_MULTIPLIERS:
            nu = cfg.get("poisson")
            if "poisson" in bridge and not isinstance(nu, (int, float)):
                raise DriverConfigError(f"{cpath}.poisson", f"required for a {bridge} bridge")
            k = np.array([-float(nu) if v == "nu" else float(v) for v in _ARM_MULTIPLIERS[bridge]])
            active = _GAUGE_ARMS[bridge]
            leads = _LEADS.get((bridge, wiring), (0.0, 0.0, 0.0, 0.0))
        else:
            raise DriverConfigError(f"{cpath}.bridge", f"unknown bridge {bridge!r}")
        if copts["lead_arms"] is not None:
            leads = tuple(copts["lead_arms"])
        lead_ohm = copts["true_lead_ohm"]
        if lead_ohm is None:
            lead_ohm = float(cfg.get("lead_ohm") or 0.0)
        offset = copts["gauge_ohm_offset"]
        if isinstance(offset, list):
            offsets = np.array(offset)
        else:
            offsets = np.zeros(4)
            offsets[active.index(True)] = offset
        r_nom = np.where(active, gauge_ohm, completion_ohm) + offsets
        if np.any(r_nom <= 0):
            raise DriverConfigError(f"{cpath}.options.gauge_ohm_offset",
                                    "leaves an arm without positive resistance")
        self._A[:, col] = r_nom + np.asarray(leads, dtype=np.float64) * lead_ohm
        self._B[:, col] = r_nom * k
        gf = copts["true_gauge_factor"]
        gf = float(cfg["gauge_factor"]) if gf is None else gf
        self._x_per_truth[col] = gf * 1e-6                   # truth in microstrain
        gf2 = copts["true_gauge_factor2"]
        self._gf2[col] = float(cfg.get("gauge_factor_2") or 0.0) if gf2 is None else gf2

    def _setup_temperature(self, col: int, cfg: Mapping[str, Any], copts: Mapping[str, Any],
                           cpath: str, reference: str, vref_v: Any, gain: float) -> None:
        """An RTD or thermocouple channel: truth in degC -> converter input (see module doc)."""
        truth = copts["truth"]
        sensor = cfg["sensor"]
        if truth["kind"] == "creep":
            raise DriverConfigError(f"{cpath}.options.truth.kind",
                                    "creep is a strain scenario: use it on strain_gauge channels")
        self._A[:, col] = 1.0                      # a dummy balanced bridge, overwritten later
        self._code_scale[col] = gain * FULL_SCALE_CODES
        self._offset[col] = copts["zero_offset_mv_per_v"] * 1e-3
        noise = copts["noise_nv_per_v"]
        self._sigma[col] = (self.options["noise_nv_per_v"] if noise is None else noise) * 1e-9
        if sensor == "rtd":
            if reference != "excitation":
                raise DriverConfigError(f"{cpath}.reference", "an RTD is read ratiometrically")
            element = cfg.get("element")
            r0 = {"pt100": 100.0, "pt1000": 1000.0}.get(element)
            if r0 is None:
                raise DriverConfigError(f"{cpath}.element", f"must be pt100 or pt1000, got {element!r}")
            r_ref = cfg.get("reference_ohm")
            if not isinstance(r_ref, (int, float)) or r_ref <= 0:
                raise DriverConfigError(f"{cpath}.reference_ohm", "required: reference resistor, ohm")
            lead = copts["true_lead_ohm"]
            lead = float(cfg.get("lead_ohm") or 0.0) if lead is None else lead
            n_leads = 2.0 if cfg.get("wiring") == "2-wire" else 0.0
            self._rtd[col] = (r0, float(r_ref), n_leads * lead)
        else:
            if reference != "external":
                raise DriverConfigError(f"{cpath}.reference", "a thermocouple needs an external "
                                        "reference (vref_v)")
            tc_type = str(cfg.get("type", "")).upper()
            if tc_type not in _temperature.TC_TYPES:
                raise DriverConfigError(f"{cpath}.type", f"unknown thermocouple type {tc_type!r}")
            junction: Any = cfg.get("junction_channel")
            if junction is None:
                jc = cfg.get("junction_c")
                if not isinstance(jc, (int, float)):
                    raise DriverConfigError(f"{cpath}.junction_c", "give junction_channel or "
                                            "junction_c")
                junction = float(jc)
            self._tc[col] = (tc_type, junction, float(vref_v))
        self.units.append("degC")
        self._truth_cfg.append(truth)

    def _link_temperatures(self, copts_all: Sequence[Mapping[str, Any]], path: str) -> None:
        """Resolve junction channels and the temperature_from of gauges to columns."""
        temps = set(self._rtd) | set(self._tc)
        cols = {name: c for c, name in enumerate(self.names)}
        for col, (tc_type, junction, vref) in list(self._tc.items()):
            if isinstance(junction, str):
                j = cols.get(junction)
                if j is None or j not in temps or j == col:
                    raise DriverConfigError(f"{path}.channels[{col}].junction_channel",
                                            f"{junction!r} is not another temperature channel")
                self._tc[col] = (tc_type, j, vref)
        for col, copts in enumerate(copts_all):
            src = copts["temperature_from"]
            poly = copts["thermal_output_microstrain"]
            alpha = float(copts["gf_alpha_per_c"])
            if src is None:
                if poly is not None or alpha != 0.0:
                    raise DriverConfigError(f"{path}.channels[{col}].options.temperature_from",
                                            "required with thermal_output_microstrain or "
                                            "gf_alpha_per_c")
                continue
            if not self._is_gauge[col]:
                raise DriverConfigError(f"{path}.channels[{col}].options.temperature_from",
                                        "only strain gauges have a thermal output")
            t = cols.get(src)
            if t is None or t not in temps:
                raise DriverConfigError(f"{path}.channels[{col}].options.temperature_from",
                                        f"{src!r} is not a temperature channel of this device")
            self._thermal[col] = {"tcol": t, "alpha": alpha,
                                  "t_ref": float(copts["gf_ref_temp_c"]),
                                  "poly": None if poly is None else np.asarray(poly, dtype=float)}

    def _setup_transducer(self, col: int, cfg: Mapping[str, Any], copts: Mapping[str, Any],
                          cpath: str) -> None:
        r_b = copts["bridge_ohm"]
        self._A[:, col] = r_b
        self._B[:, col] = r_b * np.array([1.0, -1.0, 1.0, -1.0])
        rated = copts["true_rated_output_mv_per_v"]
        if rated is None:
            rated = cfg.get("rated_output_mv_per_v")
        capacity = cfg.get("capacity")
        if rated is not None:
            if not isinstance(capacity, (int, float)) or capacity == 0:
                raise DriverConfigError(f"{cpath}.capacity", "required (non-zero) with "
                                        "rated_output_mv_per_v")
            self._x_per_truth[col] = float(rated) * 1e-3 / float(capacity)
        elif cfg.get("certificate"):
            cert = cfg["certificate"]
            self._cert[col] = _CertificateInverse(cert.get("points") or [],
                                                  int(cert.get("degree", 1)),
                                                  f"{cpath}.certificate")
        else:
            raise DriverConfigError(cpath, "a bridge transducer needs rated_output_mv_per_v and "
                                    "capacity, or a certificate")

    def _build_truth_groups(self) -> None:
        """Group channels by truth kind into parameter vectors for vectorised evaluation."""
        self._const = np.zeros(self.n_channels)
        groups: dict[str, list[int]] = {}
        for col, truth in enumerate(self._truth_cfg):
            if truth["kind"] == "constant":
                self._const[col] = truth["value"]
            else:
                groups.setdefault(truth["kind"], []).append(col)

        def vec(cols: list[int], key: str, missing: float = np.nan) -> np.ndarray:
            return np.array([missing if self._truth_cfg[c][key] is None else self._truth_cfg[c][key]
                             for c in cols], dtype=np.float64)

        self._groups: list[tuple[str, np.ndarray, dict[str, np.ndarray]]] = []
        for kind, cols in groups.items():
            params: dict[str, Any] = {}
            if kind == "ramp":
                params = {k: vec(cols, k) for k in ("start", "rate_per_s", "start_s")}
                params["until_s"] = vec(cols, "until_s", np.inf)
            elif kind == "sine":
                params = {k: vec(cols, k) for k in ("offset", "amplitude", "frequency_hz")}
                params["phase_rad"] = np.deg2rad(vec(cols, "phase_deg"))
            elif kind == "creep":
                params = {k: vec(cols, k) for k in (
                    "load_at_s", "elastic_microstrain", "primary_microstrain", "primary_tau_s",
                    "secondary_microstrain_per_h", "tertiary_microstrain", "tertiary_tau_s")}
                params["tertiary_onset_s"] = vec(cols, "tertiary_onset_s", np.inf)
            elif kind == "steps":
                params = {"cfg": [self._truth_cfg[c] for c in cols]}
            self._groups.append((kind, np.array(cols, dtype=np.intp), params))

    # -- public API -----------------------------------------------------------------------
    @property
    def period_ns(self) -> int:
        """Nominal sample period of the simulated converter, ns."""
        return self._period_ns

    def has_shunt(self, channel_index: int) -> bool:
        """Whether the channel's configuration has a shunt resistor to switch."""
        return bool(self._has_shunt[self._column(channel_index)])

    def set_shunt(self, channel_index: int, on: bool, from_index: int | None = None) -> None:
        """Switch the configured shunt of one channel, from sample `from_index` on.

        `from_index` defaults to the first sample after everything generated so far; samples
        generated while it is on carry Quality.SHUNT_ON. Raises ShuntNotConfigured when the
        channel's configuration has no ``shunt``.
        """
        col = self._column(channel_index)
        if not self._has_shunt[col]:
            raise ShuntNotConfigured(f"{self.path}.channels[{col}].shunt",
                                     f"channel {self.names[col]!r} has no shunt resistor configured")
        with self._lock:
            start = self._high_water if from_index is None else int(from_index)
            events = [e for e in self._shunt_events.get(col, []) if e[0] < start]
            events.append((start, bool(on)))
            if len(events) == 1 and not on:
                events = []
            self._shunt_events[col] = events

    def truth(self, start_index: int, n: int) -> np.ndarray:
        """(n, m) float64 truth values in each channel's unit for samples start_index.. ."""
        t = (start_index + np.arange(n, dtype=np.float64)) * self._truth_dt_s
        return self._truth_at(t)

    def ratio(self, start_index: int, n: int) -> np.ndarray:
        """(n, m) bridge output in V/V before quantisation (noise, mains and drift included)."""
        return self._ratio(start_index, n)[0]

    def codes(self, start_index: int, n: int) -> tuple[np.ndarray, np.ndarray]:
        """(n, m) int32 codes and (n, m) uint8 Quality bits for samples start_index.. ."""
        ratio, quality = self._ratio(start_index, n)
        ratio *= self._code_scale
        np.rint(ratio, out=ratio)
        if ratio.size and (ratio.max() >= CODE_MAX or ratio.min() <= CODE_MIN):
            np.minimum(ratio, CODE_MAX, out=ratio)
            np.maximum(ratio, CODE_MIN, out=ratio)
            codes = ratio.astype(np.int32)
            quality[(codes == CODE_MAX) | (codes == CODE_MIN)] |= np.uint8(Quality.SATURATED)
        else:
            codes = ratio.astype(np.int32)
        broken = self._open_mask(start_index, n)
        if broken is not None:
            codes[broken] = CODE_MAX
            quality[broken] |= np.uint8(Quality.OPEN_BRIDGE | Quality.SATURATED)
        with self._lock:
            self._high_water = max(self._high_water, start_index + n)
        return codes, quality

    # -- internals ------------------------------------------------------------------------
    def _column(self, channel_index: int) -> int:
        try:
            return self._col_of[int(channel_index)]
        except KeyError:
            raise IndexError(f"no channel with index {channel_index}") from None

    def _truth_at(self, t: np.ndarray) -> np.ndarray:
        n = t.shape[0]
        out = np.empty((n, self.n_channels))
        out[:] = self._const
        tc = t[:, None]
        for kind, cols, p in self._groups:
            if kind == "ramp":
                dt = np.clip(tc - p["start_s"], 0.0, p["until_s"] - p["start_s"])
                out[:, cols] = p["start"] + p["rate_per_s"] * dt
            elif kind == "sine":
                out[:, cols] = p["offset"] + p["amplitude"] * np.sin(
                    2.0 * np.pi * p["frequency_hz"] * tc + p["phase_rad"])
            elif kind == "creep":
                out[:, cols] = self._creep(tc, p)
            elif kind == "steps":
                for col, cfg in zip(cols, p["cfg"]):
                    out[:, col] = self._steps(t, cfg)
        return out

    @staticmethod
    def _creep(tc: np.ndarray, p: Mapping[str, np.ndarray]) -> np.ndarray:
        dt = tc - p["load_at_s"]
        loaded = dt >= 0.0
        dt = np.maximum(dt, 0.0)
        eps = (p["elastic_microstrain"]
               + p["primary_microstrain"] * -np.expm1(-dt / p["primary_tau_s"])
               + p["secondary_microstrain_per_h"] * (dt / 3600.0))
        if tc[-1, 0] > p["tertiary_onset_s"].min():
            after = np.maximum(tc - p["tertiary_onset_s"], 0.0)
            expo = np.minimum(after / p["tertiary_tau_s"], _MAX_TERTIARY_EXPONENT)
            eps = eps + p["tertiary_microstrain"] * np.expm1(expo)   # expm1(0) = 0 before onset
        return np.where(loaded, eps, 0.0)

    @staticmethod
    def _steps(t: np.ndarray, cfg: Mapping[str, Any]) -> np.ndarray:
        levels = np.asarray(cfg["levels"], dtype=np.float64)
        if cfg["step_s"] is not None:
            i = np.floor(t / cfg["step_s"]).astype(np.int64)
            i = np.mod(i, len(levels)) if cfg["repeat"] else np.minimum(i, len(levels) - 1)
            return levels[i]
        table = np.concatenate(([cfg["initial"]], levels))
        return table[np.searchsorted(np.asarray(cfg["times_s"]), t, side="right")]

    def _x(self, truth: np.ndarray) -> np.ndarray:
        """dR/R of the gauge (strain gauges) or the bridge ratio (transducers), (n, m)."""
        x = np.multiply(truth, self._x_per_truth)
        if self._any_gf2:
            e = truth * 1e-6
            e *= e
            e *= self._gf2
            x += e
        for col, th in self._thermal.items():
            temp = truth[:, th["tcol"]]
            x_mech = x[:, col]
            if th["alpha"]:
                x_mech = x_mech * (1.0 + th["alpha"] * (temp - th["t_ref"]))
            if th["poly"] is not None:
                x_mech = x_mech + self._x_per_truth[col] * np.polynomial.polynomial.polyval(
                    temp, th["poly"])
            x[:, col] = x_mech
        for col, cert in self._cert.items():
            x[:, col] = cert.ratio(truth[:, col])
        if x.size and (x.min() < self._x_lo_min or x.max() > self._x_hi_max):
            np.minimum(x, self._x_hi, out=x)
            np.maximum(x, self._x_lo, out=x)
        return x

    def _shunt_mask(self, start_index: int, n: int) -> np.ndarray | None:
        with self._lock:
            events = {c: list(e) for c, e in self._shunt_events.items() if e}
        if not events:
            return None
        mask = np.zeros((n, self.n_channels), dtype=bool)
        idx = start_index + np.arange(n, dtype=np.int64)
        for col, ev in events.items():
            froms = np.array([e[0] for e in ev], dtype=np.int64)
            states = np.array([e[1] for e in ev], dtype=bool)
            pos = np.searchsorted(froms, idx, side="right") - 1
            mask[:, col] = np.where(pos >= 0, states[np.maximum(pos, 0)], False)
        return mask if mask.any() else None

    def _open_mask(self, start_index: int, n: int) -> np.ndarray | None:
        if not (self._open.any() or np.isfinite(self._rupture_s).any()):
            return None
        t = (start_index + np.arange(n, dtype=np.float64)) * self._truth_dt_s
        mask = (t[:, None] >= self._rupture_s) | self._open
        return mask if mask.any() else None

    def _half(self, upper: np.ndarray, lower: np.ndarray) -> np.ndarray:
        """Divider output lower / (upper + lower), reusing a fresh (n, m) operand when there is one."""
        den = upper + lower
        return np.divide(lower, den, out=den) if den.ndim == 2 else lower / den

    def _ratio(self, start_index: int, n: int) -> tuple[np.ndarray, np.ndarray]:
        if start_index < 0 or n < 0:
            raise ValueError("start_index and n must be >= 0")
        m = self.n_channels
        quality = np.zeros((n, m), dtype=np.uint8)
        if n == 0:
            return np.zeros((0, m)), quality
        truth = self.truth(start_index, n)
        x = self._x(truth)
        arms = []
        for a in range(4):
            if self._varying_arm[a]:
                r = np.multiply(x, self._B[a])
                r += self._A[a]
                arms.append(r)
            else:
                arms.append(self._A[a])
        shunt = self._shunt_mask(start_index, n) if self._any_shunt else None
        if shunt is not None:
            quality[shunt] |= np.uint8(Quality.SHUNT_ON)
            switched = shunt.any(axis=0)
            for a in range(4):
                if np.any(self._shunt_g[a][switched] > 0):
                    r = np.broadcast_to(arms[a], (n, m))
                    arms[a] = r / (1.0 + r * (self._shunt_g[a] * shunt))
        r1, r2, r3, r4 = arms
        # divider voltages of the two halves, per volt of excitation:
        # V(B)/Vex = R1 / (R2 + R1), V(D)/Vex = R4 / (R3 + R4)
        ratio = self._half(r2, r1)
        ratio = np.subtract(ratio, self._half(r3, r4), out=ratio if ratio.ndim == 2 else None)
        if ratio.shape != (n, m):
            ratio = np.array(np.broadcast_to(ratio, (n, m)), dtype=np.float64, order="C")
        if self._temp_cols:
            self._temperature_inputs(truth, ratio)
        if self._any_offset:
            ratio += self._offset
        if self._noise:
            self._add_noise(ratio, start_index)
        if self._mains_amp or self._drift_per_sample:
            # mains and drift are common to the device: one (n, 1) column added to every channel
            common = np.zeros(n)
            if self._mains_amp:
                # phase reduced exactly in integer ns so that long runs keep it
                idx = start_index + np.arange(n, dtype=np.int64)
                cycles = np.mod(idx * (self._period_ns * self._mains_hz), 1_000_000_000) * 1e-9
                common += self._mains_amp * np.sin(2.0 * np.pi * cycles + self._mains_phase)
            if self._drift_per_sample:
                common += (start_index + np.arange(n, dtype=np.float64)) * self._drift_per_sample
            ratio += common[:, None]
        return ratio, quality

    def _temperature_inputs(self, truth: np.ndarray, ratio: np.ndarray) -> None:
        """Converter input (fraction of the reference) of RTD and thermocouple columns."""
        for col, (r0, r_ref, leads_ohm) in self._rtd.items():
            t = np.clip(truth[:, col], _temperature.RTD_T_MIN_C, _temperature.RTD_T_MAX_C)
            ratio[:, col] = (_temperature.rtd_resistance(t, r0) + leads_ohm) / r_ref
        for col, (tc_type, junction, vref) in self._tc.items():
            lo, hi = _temperature.tc_range_c(tc_type)
            t = np.clip(truth[:, col], lo, hi)
            tj = np.clip(truth[:, junction], lo, hi) if isinstance(junction, int) else junction
            emf_mv = _temperature.tc_emf_mv(tc_type, t) - _temperature.tc_emf_mv(tc_type, tj)
            ratio[:, col] = emf_mv * 1e-3 / vref

    def _page(self, page: int) -> np.ndarray:
        """(PAGE_SAMPLES, m) noise of one page in V/V (standard normal x sigma), cached.

        Channel c's page p comes from a PCG64 stream seeded by SeedSequence((seed, index of c))
        and advanced by p * 2**40 draws: a function of (seed, channel index, page) only.
        """
        cached = self._pages.get(page)
        if cached is not None:
            return cached
        raw = np.empty((self.n_channels, PAGE_SAMPLES))
        for col, (bitgen, gen, base) in enumerate(self._streams):
            bitgen.state = base
            bitgen.advance(page << 40)
            gen.standard_normal(out=raw[col])
        out = np.empty((PAGE_SAMPLES, self.n_channels))
        np.multiply(raw.T, self._sigma, out=out)     # one transpose-and-scale per page
        if len(self._pages) >= 3:
            self._pages.pop(next(iter(self._pages)))
        self._pages[page] = out
        return out

    def _add_noise(self, ratio: np.ndarray, start_index: int) -> None:
        """Add the noise of samples start_index.. to `ratio` in place, page by page."""
        n = ratio.shape[0]
        done = 0
        while done < n:
            page, lo = divmod(start_index + done, PAGE_SAMPLES)
            take = min(PAGE_SAMPLES - lo, n - done)
            ratio[done:done + take] += self._page(page)[lo:lo + take]
            done += take


# ------------------------------------------------------------------------------------------
# the driver
# ------------------------------------------------------------------------------------------

class SimulatedBridge(Driver):
    """Simulated 24-bit bridge converter (see the module docstring for every option)."""

    summary = ("simulated 24-bit bridge converter: scripted strain/load truth through the exact "
               "bridge, leads, shunt, noise, mains, drift and quantisation")

    OPTIONS = Section({
        **SIM_OPTION_FIELDS,
        "realtime": Field(bool, True, doc="pace blocks to the host clock"),
        "fifo_s": Field(float, 0.0, min=0.0, doc="converter buffer when the reader lags "
                        "(0 = unlimited)", unit="s"),
    })
    CHANNEL_OPTIONS = CHANNEL_OPTIONS

    MAX_CHANNELS = 32
    MIN_RATE_HZ = 1.0
    MAX_RATE_HZ = 10_000.0

    def __init__(self, setup: DeviceSetup, options: Mapping[str, Any]):
        super().__init__(setup, options)
        self._sim: BridgeSimulator | None = None
        self._index = 0
        self._seq = 0
        self._t0_mono = 0.0

    @classmethod
    def example(cls) -> tuple[DeviceSetup, dict[str, Any]]:
        """Two quarter-bridge channels at 1 kS/s, not paced (for the driver contract test)."""
        from straind.schema import validate
        chans = []
        for k, micro in enumerate((500.0, -250.0)):
            cfg = {"name": f"g{k}", "sensor": "strain_gauge", "excitation_v": 5.0,
                   "gauge_factor": 2.0, "gauge_ohm": 350.0, "bridge": "quarter",
                   "wiring": "3-wire", "lead_ohm": 0.0, "completion_ohm": 350.0,
                   "poisson": None, "arms": None, "shunt": None}
            opts = validate(cls.CHANNEL_OPTIONS, {"truth": {"kind": "constant", "value": micro}})
            cfg["options"] = opts
            chans.append(ChannelSetup(cfg["name"], k, cfg, opts))
        setup = DeviceSetup("example", 1000.0, 100, tuple(chans),
                            {"adc": {"gain": 128, "reference": "excitation", "vref_v": None}})
        return setup, validate(cls.OPTIONS, {"realtime": False})

    @classmethod
    def static_info(cls, options: Mapping[str, Any]) -> DriverInfo:
        return DriverInfo(summary=cls.summary, max_channels=cls.MAX_CHANNELS,
                          min_rate_hz=cls.MIN_RATE_HZ, max_rate_hz=cls.MAX_RATE_HZ,
                          native="code24", can_shunt=True,
                          details={"noise_page_samples": PAGE_SAMPLES,
                                   "full_scale_codes": int(FULL_SCALE_CODES)})

    @classmethod
    def check_setup(cls, setup: DeviceSetup, options: Mapping[str, Any], path: str) -> None:
        """Channel count, rate, block size and every channel's truth and physics."""
        super().check_setup(setup, options, path)
        if not setup.channels:
            raise DriverConfigError(f"{path}.channels", "needs at least one channel")
        if setup.block_samples < 1:
            raise DriverConfigError(f"{path}.block_samples", "must be >= 1")
        opts = _validated(cls.OPTIONS, dict(options), f"{path}.options")
        BridgeSimulator(setup, opts, path)

    # -- contract -------------------------------------------------------------------------
    def open(self) -> None:
        opts = _validated(self.OPTIONS, dict(self.options), f"{self.setup.name}.options")
        self._sim = BridgeSimulator(self.setup, opts, self.setup.name)
        self._realtime = bool(opts["realtime"])
        self._fifo_samples = int(round(opts["fifo_s"] / self._sim._period_s))
        self._index = 0
        self._seq = 0
        self._t0_mono = time.monotonic()

    def read_block(self, timeout_s: float) -> Block | None:
        sim = self._sim
        if sim is None:
            raise DriverIOError(f"{self.setup.name}: read_block() before open()")
        n = self.setup.block_samples
        period_s = sim._period_s
        gap = False
        if self._realtime:
            now = time.monotonic()
            if self._fifo_samples:
                produced = int((now - self._t0_mono) / period_s) + 1
                lost = produced - self._index - self._fifo_samples
                if lost > 0:
                    self.report("overrun", first_lost=self._index, samples_lost=lost)
                    self.count("samples_lost", lost)
                    self._index += lost
                    gap = True
            wait_s = self._t0_mono + (self._index + n - 1) * period_s - now
            if wait_s > timeout_s:
                time.sleep(max(0.0, timeout_s))
                return None
            if wait_s > 0:
                time.sleep(wait_s)
        codes, quality = sim.codes(self._index, n)
        if gap:
            quality[0] |= np.uint8(Quality.AFTER_GAP)
        block = Block(device=self.setup.name, data=codes, quality=quality,
                      start_index=self._index, period_ns=sim.period_ns, seq=self._seq,
                      host_mono_ns=time.monotonic_ns(), host_wall_ns=time.time_ns())
        self._index += n
        self._seq += 1
        self.count("blocks")
        self.count("samples", n)
        return block

    def close(self) -> None:
        self._sim = None

    def set_shunt(self, channel_index: int, on: bool) -> None:
        """Switch the configured shunt from the next block's first sample on."""
        cols = [c for c, ch in enumerate(self.setup.channels) if ch.index == channel_index]
        if not cols:
            raise IndexError(f"no channel with index {channel_index}")
        if not self.setup.channels[cols[0]].config.get("shunt"):
            raise ShuntNotConfigured(f"{self.setup.name}.channels[{cols[0]}].shunt",
                                     f"channel {self.setup.channels[cols[0]].name!r} has no "
                                     "shunt resistor configured")
        sim = self._sim
        if sim is None:
            raise DriverIOError(f"{self.setup.name}: set_shunt() before open()")
        sim.set_shunt(channel_index, on, from_index=self._index)
        self.report("shunt", channel=sim.names[sim._column(channel_index)], on=bool(on),
                    from_index=self._index)
