"""Loading and validating the straind configuration (YAML).

One function, `load_config`, turns a file (or text) into a validated, defaults-filled `Config`, or
raises `ConfigError` whose message names the key path and the line, e.g.
``devices[0].channels[2].gauge_factor (line 31): required key is missing``.
Driver options are validated by the driver's own schema, so unknown driver options are rejected
just like unknown core keys. The fixed, scriptable keys are station.id, storage.path,
devices[].name, devices[].driver and devices[].channels[].name.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

from straind.schema import (ConfigError, Field, ListOf, Section, line_of,
                            load_yaml_text, validate)
from straind.temperature import TC_TYPES
from straind.thermal import GAUGE_TYPES, gauge_factor_warning

__all__ = ["Config", "load_config", "load_config_text", "CONFIG_SCHEMA", "SENSOR_SECTIONS", "redact_text",
           "GAINS", "BRIDGES", "register_section", "TEMPERATURE_SENSORS", "DERIVED_KINDS",
           "ALARM_RULE", "derived_outputs", "channel_reference", "config_warnings",
           "SELF_COMPENSATING_BRIDGES", "device_columns", "resolve_channel", "derived_inputs"]

GAINS = (1, 2, 4, 8, 16, 32, 64, 128)
BRIDGES = ("quarter", "half-bending", "half-poisson", "half-opposite", "full-bending",
           "full-poisson", "custom")
_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,62}$")


def _name(value: Any, path: str, line: int | None) -> str:
    """Names become HDF5 group names, file names and MQTT topic levels: keep them plain."""
    if not isinstance(value, str) or not _NAME_RE.match(value):
        raise ConfigError(path, "must be 1-63 characters of letters, digits, '_', '-' or '.', "
                                f"starting with a letter or digit; got {value!r}", line)
    return value


def _arms(value: Any, path: str, line: int | None) -> list[float]:
    if (not isinstance(value, list) or len(value) != 4
            or any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in value)):
        raise ConfigError(path, f"must be a list of 4 numbers (multipliers k1..k4), got {value!r}",
                          line)
    if all(v == 0 for v in value):
        raise ConfigError(path, "at least one arm must be active (non-zero multiplier)", line)
    return [float(v) for v in value]


def _points(value: Any, path: str, line: int | None) -> list[list[float]]:
    ok = isinstance(value, list) and all(
        isinstance(p, list) and len(p) == 2
        and all(not isinstance(v, bool) and isinstance(v, (int, float)) for v in p) for p in value)
    if not ok:
        raise ConfigError(path, "must be a list of [mv_per_v, value] pairs", line)
    return [[float(a), float(b)] for a, b in value]


TARE_SECTION = Section({
    "at_start": Field(bool, False, doc="take a zero at the first start if none is stored"),
})

SHUNT_SECTION = Section({
    "ohm": Field(float, doc="shunt calibration resistor", unit="ohm", min=0, min_exclusive=True),
    "arm": Field(int, 1, doc="bridge arm the shunt is connected across (1-4)", min=1, max=4),
    "tolerance_pct": Field(float, 1.0, doc="gain error beyond which the channel is flagged",
                           unit="%", min=0),
    "at_gauge": Field(bool, False, doc="true: the shunt is across the gauge itself (leads not "
                      "included); false: at the instrument terminals (leads included)"),
})

_COMMON_CHANNEL = {
    "name": Field(_name, doc="channel name (fixed key)"),
    "sensor": Field(str, doc="kind of sensor"),
    "description": Field(str, "", doc="free text (gauge location, serial number)"),
    "excitation_v": Field(float, doc="bridge excitation voltage", unit="V", min=0,
                          min_exclusive=True, max=30),
    "tare": TARE_SECTION,
    "options": Field(dict, {}, doc="driver-specific per-channel options"),
}

#: Per-channel converter settings (front-ends that mux channels set the PGA and reference per
#: channel); absent = the device's adc section.
_CONVERTER_OVERRIDES = {
    "gain": Field(int, None, nullable=True, choices=GAINS,
                  doc="PGA gain of this channel; default adc.gain"),
    "reference": Field(str, None, nullable=True, choices=("excitation", "external"),
                       doc="converter reference of this channel; default adc.reference"),
    "vref_v": Field(float, None, nullable=True, unit="V", min=0, min_exclusive=True,
                    doc="external reference voltage of this channel; default adc.vref_v"),
}
_COMMON_CHANNEL.update(_CONVERTER_OVERRIDES)

#: Arrangements whose active gauges sit in adjacent arms: their thermal outputs cancel in the
#: bridge itself, so a software correction would remove the thermal output twice.
SELF_COMPENSATING_BRIDGES = ("half-bending", "half-poisson", "full-bending", "full-poisson")


def _coefficients(value: Any, path: str, line: int | None) -> list[float]:
    ok = (isinstance(value, list) and 1 <= len(value) <= 5
          and all(not isinstance(v, bool) and isinstance(v, (int, float)) and math.isfinite(v)
                  for v in value))
    if not ok:
        raise ConfigError(path, "must be a list of 1 to 5 numbers A0..A4 (microstrain, T in degC: "
                          f"eps_app = A0 + A1 T + ... + A4 T^4), got {value!r}", line)
    return [float(v) for v in value]


def _check_thermal(th: dict, path: str, src: Any) -> None:
    comp = th["compensation"]
    if comp == "software":
        if th["thermal_output"] is None:
            raise ConfigError(f"{path}.thermal_output", "required with compensation 'software' "
                              "(the gauge lot's thermal output polynomial)", line_of(src))
        if th["temperature_channel"] is None:
            raise ConfigError(f"{path}.temperature_channel", "required with compensation "
                              "'software'", line_of(src))
        if th["thermal_output"]["gauge_factor_ref"] == 0:
            raise ConfigError(f"{path}.thermal_output.gauge_factor_ref", "must not be 0",
                              line_of(src, "thermal_output"))
    elif th["thermal_output"] is not None:
        why = (" (a dummy gauge compensates it in the bridge: correcting it here as well would "
               "remove it twice)" if comp == "dummy-gauge" else "")
        raise ConfigError(f"{path}.thermal_output", "only used with compensation 'software'" + why,
                          line_of(src, "thermal_output"))
    if th["gf_alpha_per_c"] != 0 and th["temperature_channel"] is None:
        raise ConfigError(f"{path}.temperature_channel", "required when gf_alpha_per_c is not 0 "
                          "(the gauge factor correction needs the gauge temperature)", line_of(src))


THERMAL_SECTION = Section({
    "compensation": Field(str, doc="software: thermal output removed here; dummy-gauge: "
                          "compensated in the bridge by a dummy gauge in the adjacent arm (never "
                          "corrected again); none", choices=("software", "dummy-gauge", "none")),
    "temperature_channel": Field(_name, None, nullable=True,
                                 doc="temperature channel (rtd or thermocouple) on the same device "
                                 "that reads the gauge temperature"),
    "thermal_output": Section({
        "coefficients": Field(_coefficients, doc="A0..A4 of eps_app(T)", unit="microstrain"),
        "gauge_factor_ref": Field(float, doc="gauge factor the polynomial was measured with",
                                  min=-500, max=500),
    }, default=None),
    "gf_alpha_per_c": Field(float, 0.0, doc="temperature coefficient of the gauge factor",
                            unit="1/degC"),
    "gf_ref_temp_c": Field(float, 24.0, doc="temperature at which gauge_factor holds",
                           unit="degC"),
}, check=_check_thermal, default=None)


def _check_kt(value: Any, path: str, line: int | None) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not abs(value) < 1:
        raise ConfigError(path, f"must be a number with |Kt| < 1 (ASTM E251), got {value!r}", line)
    return float(value)


TRANSVERSE_SECTION = Section({
    "kt": Field(_check_kt, doc="transverse sensitivity coefficient Kt (ASTM E251, nu0 = 0.285)"),
    "pair": Field(_name, doc="the orthogonal gauge on the same device (it declares this one back)"),
}, default=None)


def _check_strain(ch: dict, path: str, src: Any) -> None:
    bridge = ch["bridge"]
    if bridge.endswith("poisson") and ch["poisson"] is None:
        raise ConfigError(f"{path}.poisson", f"required for bridge {bridge!r}", line_of(src))
    if bridge == "custom" and ch["arms"] is None:
        raise ConfigError(f"{path}.arms", "required for bridge 'custom'", line_of(src))
    if not bridge.endswith("poisson") and ch["poisson"] is not None:
        raise ConfigError(f"{path}.poisson", f"only used with the *-poisson bridges, not {bridge!r}",
                          line_of(src, "poisson"))
    if bridge.startswith("full") and ch["completion_ohm"] not in (None, ch["gauge_ohm"]):
        raise ConfigError(f"{path}.completion_ohm", "a full bridge has no completion resistors",
                          line_of(src, "completion_ohm"))
    if bridge != "custom" and ch["arms"] is not None:
        raise ConfigError(f"{path}.arms", f"only used with bridge 'custom', not {bridge!r}",
                          line_of(src, "arms"))
    if ch["wiring"] == "2-wire" and bridge != "quarter":
        raise ConfigError(f"{path}.wiring", "2-wire connection is only possible for a quarter bridge",
                          line_of(src, "wiring"))
    if bridge.startswith("full") and ch["lead_ohm"] != 0:
        raise ConfigError(f"{path}.lead_ohm", "leads of a full bridge are outside its arms; "
                          "use remote sense instead of lead_ohm", line_of(src, "lead_ohm"))
    if ch["completion_ohm"] is None:
        ch["completion_ohm"] = ch["gauge_ohm"]
    th = ch["thermal"]
    if th is not None and th["compensation"] in ("software", "dummy-gauge"):
        arms = ch["arms"] or []
        self_comp = bridge in SELF_COMPENSATING_BRIDGES or (
            bridge == "custom" and (arms[1] != 0 or arms[3] != 0))
        if self_comp:
            what = ("software compensation would remove the thermal output twice"
                    if th["compensation"] == "software" else
                    "there is no completion arm for a dummy gauge")
            raise ConfigError(f"{path}.thermal.compensation",
                              f"bridge {bridge!r} has active gauges in adjacent arms, which cancel "
                              f"the thermal output in the bridge: {what}; use compensation 'none'",
                              line_of(src, "thermal"))


STRAIN_GAUGE = Section({
    **_COMMON_CHANNEL,
    "gauge_factor": Field(float, doc="gauge factor from the gauge packet", min=-500, max=500),
    "gauge_ohm": Field(float, doc="nominal gauge resistance", unit="ohm", min=0,
                       min_exclusive=True),
    "bridge": Field(str, doc="bridge arrangement", choices=BRIDGES),
    "wiring": Field(str, "3-wire", doc="lead connection of quarter and half bridges",
                    choices=("2-wire", "3-wire")),
    "lead_ohm": Field(float, 0.0, doc="resistance of each lead wire", unit="ohm", min=0),
    "completion_ohm": Field(float, None, nullable=True, doc="completion (dummy) arm resistance; "
                            "default gauge_ohm", unit="ohm", min=0, min_exclusive=True),
    "poisson": Field(float, None, nullable=True, doc="Poisson's ratio for *-poisson bridges",
                     min=0, max=0.5),
    "arms": Field(_arms, None, nullable=True, doc="custom: strain multipliers of arms 1-4"),
    "shunt": Section(SHUNT_SECTION.fields, default=None),
    "gauge_factor_2": Field(float, 0.0, doc="quadratic gauge coefficient of semiconductor gauges: "
                            "dR/R = GF eps + GF2 eps^2", unit="1/strain^2"),
    "gauge_type": Field(str, None, nullable=True, choices=GAUGE_TYPES,
                        doc="gauge material, for a plausibility warning on gauge_factor"),
    "thermal": THERMAL_SECTION,
    "transverse": TRANSVERSE_SECTION,
}, check=_check_strain)


def _check_transducer(ch: dict, path: str, src: Any) -> None:
    rated = ch["rated_output_mv_per_v"] is not None, ch["capacity"] is not None
    cert = ch["certificate"] is not None
    if cert and any(rated):
        raise ConfigError(path, "give either rated_output_mv_per_v with capacity, or certificate, "
                                "not both", line_of(src))
    if not cert and not all(rated):
        missing = "rated_output_mv_per_v" if not rated[0] else "capacity"
        raise ConfigError(f"{path}.{missing}", "required (or give a certificate)", line_of(src))
    if cert:
        pts = ch["certificate"]["points"]
        deg = ch["certificate"]["degree"]
        if len({p[0] for p in pts}) < deg + 1:
            raise ConfigError(f"{path}.certificate.points",
                              f"a degree {deg} fit needs at least {deg + 1} distinct points",
                              line_of(src, "certificate"))


BRIDGE_TRANSDUCER = Section({
    **_COMMON_CHANNEL,
    "quantity": Field(str, doc="measured quantity",
                      choices=("force", "pressure", "torque", "displacement", "other")),
    "unit": Field(str, doc="engineering unit of the output, e.g. kN, bar, N*m"),
    "rated_output_mv_per_v": Field(float, None, nullable=True, doc="rated output at capacity",
                                   unit="mV/V", min=0, min_exclusive=True),
    "capacity": Field(float, None, nullable=True, doc="rated capacity in `unit`", min=0,
                      min_exclusive=True),
    "certificate": Section({
        "points": Field(_points, doc="calibration points [mv_per_v, value]"),
        "degree": Field(int, 1, doc="polynomial degree (ISO 376 allows 1 to 3)", min=1, max=3),
    }, default=None),
}, check=_check_transducer)

def _no_tare(ch: dict) -> None:
    # Tare does not apply to temperature channels (absolute readings): the key is not accepted,
    # and code that reads ch["tare"]["at_start"] sees false.
    ch["tare"] = {"at_start": False}


def _check_rtd(ch: dict, path: str, src: Any) -> None:
    if ch["reference"] == "external":
        raise ConfigError(f"{path}.reference", "an RTD is read ratiometrically against "
                          "reference_ohm (the converter reference is the voltage across it): "
                          "use 'excitation' or leave the key out", line_of(src, "reference"))
    ch["reference"] = "excitation"
    _no_tare(ch)


_TEMPERATURE_COMMON = {
    "name": Field(_name, doc="channel name (fixed key)"),
    "sensor": Field(str, doc="kind of sensor"),
    "description": Field(str, "", doc="free text (location, serial number)"),
    "unit": Field(str, "degC", doc="unit of the value", choices=("degC",)),
    "options": Field(dict, {}, doc="driver-specific per-channel options"),
    **_CONVERTER_OVERRIDES,
}

RTD = Section({
    **_TEMPERATURE_COMMON,
    "element": Field(str, doc="platinum element (IEC 60751)", choices=("pt100", "pt1000")),
    "reference_ohm": Field(float, doc="series reference resistor: full-scale code means "
                           "R_rtd = reference_ohm", unit="ohm", min=0, min_exclusive=True),
    "wiring": Field(str, "4-wire", doc="2-wire: both leads in series, subtracted as 2 lead_ohm; "
                    "3-/4-wire: leads compensated", choices=("2-wire", "3-wire", "4-wire")),
    "lead_ohm": Field(float, 0.0, doc="resistance of each lead (subtracted for 2-wire)",
                      unit="ohm", min=0),
    "excitation_v": Field(float, None, nullable=True, unit="V", min=0, min_exclusive=True,
                          max=30, doc="not used by the ratiometric reading; recorded only"),
}, check=_check_rtd)


def _check_thermocouple(ch: dict, path: str, src: Any) -> None:
    if (ch["junction_channel"] is None) == (ch["junction_c"] is None):
        raise ConfigError(f"{path}.junction_channel", "give exactly one of junction_channel (a "
                          "temperature channel on the same device) or junction_c (a fixed "
                          "cold-junction temperature)", line_of(src))
    if ch["reference"] == "excitation":
        raise ConfigError(f"{path}.reference", "a thermocouple is read as a voltage: it needs an "
                          "external reference (vref_v)", line_of(src, "reference"))
    ch["reference"] = "external"
    _no_tare(ch)


THERMOCOUPLE = Section({
    **_TEMPERATURE_COMMON,
    "type": Field(str, doc="thermocouple type (ITS-90 reference functions)", choices=TC_TYPES),
    "junction_channel": Field(_name, None, nullable=True,
                              doc="temperature channel at the cold junction (same device)"),
    "junction_c": Field(float, None, nullable=True, unit="degC", min=-270, max=1800,
                        doc="fixed cold-junction temperature"),
}, check=_check_thermocouple)

#: Sensors whose value is a temperature (degC); tare does not apply to them.
TEMPERATURE_SENSORS = ("rtd", "thermocouple")

#: sensor name -> channel schema; measurement modules add their sensors here.
SENSOR_SECTIONS: dict[str, Section] = {
    "strain_gauge": STRAIN_GAUGE,
    "bridge_transducer": BRIDGE_TRANSDUCER,
    "rtd": RTD,
    "thermocouple": THERMOCOUPLE,
}


def _channel(value: Any, path: str, line: int | None) -> dict:
    if not isinstance(value, dict):
        raise ConfigError(path, f"expected a mapping, got {value!r}", line)
    sensor = value.get("sensor")
    if sensor is None:
        raise ConfigError(f"{path}.sensor", "required key is missing "
                          f"(one of {', '.join(SENSOR_SECTIONS)})", line_of(value))
    if sensor not in SENSOR_SECTIONS:
        raise ConfigError(f"{path}.sensor", f"must be one of {', '.join(SENSOR_SECTIONS)}, "
                          f"got {sensor!r}", line_of(value, "sensor"))
    return validate(SENSOR_SECTIONS[sensor], value, path, line)


def _check_adc(adc: dict, path: str, src: Any) -> None:
    if adc["reference"] == "external" and adc["vref_v"] is None:
        raise ConfigError(f"{path}.vref_v", "required when reference is 'external'", line_of(src))


ADC_SECTION = Section({
    "gain": Field(int, doc="PGA gain of the bridge converter", choices=GAINS),
    "reference": Field(str, "excitation", doc="'excitation' (ratiometric) or 'external'",
                       choices=("excitation", "external")),
    "vref_v": Field(float, None, nullable=True, doc="external reference voltage", unit="V",
                    min=0, min_exclusive=True),
}, check=_check_adc)

def _name_list(count: int) -> Callable[[Any, str, int | None], list[str]]:
    def check(value: Any, path: str, line: int | None) -> list[str]:
        if not isinstance(value, list) or len(value) != count:
            raise ConfigError(path, f"must be a list of {count} channel names, got {value!r}", line)
        out = [_name(v, f"{path}[{i}]", line_of(value, i) or line) for i, v in enumerate(value)]
        if len(set(out)) != count:
            raise ConfigError(path, f"names must be distinct, got {out!r}", line)
        return out
    return check


def _angles3(value: Any, path: str, line: int | None) -> list[float]:
    ok = isinstance(value, list) and len(value) == 3 and all(
        not isinstance(v, bool) and isinstance(v, (int, float)) and math.isfinite(v) for v in value)
    if not ok:
        raise ConfigError(path, f"must be three gauge angles in degrees, got {value!r}", line)
    return [float(v) for v in value]


def _check_material(m: dict, path: str, src: Any) -> None:
    if not -1 < m["poisson"] < 0.5:
        raise ConfigError(f"{path}.poisson", f"must lie in (-1, 0.5), got {m['poisson']!r}",
                          line_of(src, "poisson"))


MATERIAL_SECTION = Section({
    "e_mpa": Field(float, doc="Young's modulus", unit="MPa", min=0, min_exclusive=True),
    "poisson": Field(float, doc="Poisson's ratio"),
}, check=_check_material, default=None)


def _check_rosette(d: dict, path: str, src: Any) -> None:
    if (d["angles_deg"] is None) == (d["layout"] is None):
        raise ConfigError(f"{path}.layout", "give exactly one of layout (rectangular: 0/45/90, "
                          "delta: 0/60/120) or angles_deg", line_of(src))
    if d["angles_deg"] is None:
        d["angles_deg"] = [0.0, 45.0, 90.0] if d["layout"] == "rectangular" else [0.0, 60.0, 120.0]
    import numpy as np
    from straind.rosette import gauge_matrix
    if np.linalg.cond(gauge_matrix(d["angles_deg"], d["kt"])) > 1e10:
        raise ConfigError(f"{path}.angles_deg", f"gauges at {d['angles_deg']} degrees do not "
                          "determine the strain tensor", line_of(src, "angles_deg"))


_DERIVED_COMMON = {
    "name": Field(_name, doc="name of the derived value (prefix of its columns)"),
    "kind": Field(str, doc="rosette, uniaxial_stress or creep"),
    "description": Field(str, ""),
}

#: kind -> schema of one `devices[].derived[]` entry.
DERIVED_KINDS: dict[str, Section] = {
    "rosette": Section({
        **_DERIVED_COMMON,
        "gauges": Field(_name_list(3), doc="gauges a, b, c (strain_gauge channels)"),
        "angles_deg": Field(_angles3, None, nullable=True, unit="degree",
                            doc="angle of each gauge from the x axis (the first gauge's axis)"),
        "layout": Field(str, None, nullable=True, choices=("rectangular", "delta"),
                        doc="rectangular = 0/45/90, delta = 0/60/120"),
        "kt": Field(_check_kt, 0.0, doc="transverse sensitivity of the rosette's gauges"),
        "material": MATERIAL_SECTION,
    }, check=_check_rosette),
    "uniaxial_stress": Section({
        **_DERIVED_COMMON,
        "gauge": Field(_name, doc="strain input"),
        "e_mpa": Field(float, doc="Young's modulus", unit="MPa", min=0, min_exclusive=True),
    }),
    "creep": Section({
        **_DERIVED_COMMON,
        "gauge": Field(_name, doc="strain input"),
        "window_s": Field(float, doc="least-squares window of the creep rate", unit="s", min=0,
                          min_exclusive=True),
        "reference": Field(str, "tare", choices=("tare", "first"),
                           doc="tare: creep strain = the gauge value; first: minus the first "
                           "usable value (kept in the state file)"),
    }),
}


def _derived(value: Any, path: str, line: int | None) -> dict:
    if not isinstance(value, dict):
        raise ConfigError(path, f"expected a mapping, got {value!r}", line)
    kind = value.get("kind")
    if kind not in DERIVED_KINDS:
        raise ConfigError(f"{path}.kind", f"must be one of {', '.join(DERIVED_KINDS)}, got {kind!r}",
                          line_of(value, "kind") or line)
    return validate(DERIVED_KINDS[kind], value, path, line)


def derived_outputs(entry: Mapping[str, Any]) -> list[tuple[str, str, str]]:
    """Columns of one derived entry: (name, unit, quantity), in column order."""
    n, kind = entry["name"], entry["kind"]
    if kind == "rosette":
        out = [(f"{n}_e1", "microstrain", "strain"), (f"{n}_e2", "microstrain", "strain"),
               (f"{n}_theta_deg", "degree", "angle"), (f"{n}_gamma_max", "microstrain", "strain")]
        if entry.get("material"):
            out += [(f"{n}_{s}", "MPa", "stress") for s in ("s1", "s2", "von_mises", "tresca")]
        return out
    if kind == "uniaxial_stress":
        return [(n, "MPa", "stress")]
    if kind == "creep":
        return [(f"{n}_strain", "microstrain", "strain"),
                (f"{n}_rate", "microstrain/h", "strain_rate")]
    raise ValueError(f"unknown derived kind {kind!r}")


def derived_inputs(entry: Mapping[str, Any]) -> list[str]:
    """Names of the columns a derived entry reads."""
    return list(entry["gauges"]) if entry["kind"] == "rosette" else [entry["gauge"]]


def channel_reference(ch: Mapping[str, Any], adc: Mapping[str, Any] | None
                      ) -> tuple[int, str, float | None]:
    """(gain, reference, vref_v) in force for one channel: its own keys, else the adc section."""
    adc = adc or {}
    gain = ch.get("gain") or adc.get("gain") or 1
    reference = ch.get("reference") or adc.get("reference") or "excitation"
    vref = ch.get("vref_v")
    if vref is None:
        vref = adc.get("vref_v")
    return int(gain), str(reference), vref


def _check_device(dev: dict, path: str, src: Any) -> None:
    """Rules between channels of one device: references, temperature links, pairs, derived."""
    chans = dev["channels"]
    raw_chs = src.get("channels") if isinstance(src, dict) else None
    raw_chs = raw_chs if isinstance(raw_chs, list) else []
    by_name = {c["name"]: c for c in chans}

    def raw(i: int) -> Any:
        return raw_chs[i] if i < len(raw_chs) else src

    def temperature_ref(name: str | None, key: str, i: int, own: str) -> None:
        if name is None:
            return
        target = by_name.get(name)
        where = f"{path}.channels[{i}].{key}"
        if target is None:
            raise ConfigError(where, f"no channel named {name!r} on device {dev['name']!r}",
                              line_of(raw(i), key.split(".")[0]))
        if target["sensor"] not in TEMPERATURE_SENSORS or name == own:
            raise ConfigError(where, f"{name!r} must be another temperature channel (rtd or "
                              f"thermocouple), not {target['sensor']!r}",
                              line_of(raw(i), key.split(".")[0]))

    for i, ch in enumerate(chans):
        cpath = f"{path}.channels[{i}]"
        if dev["adc"] is not None:
            gain, ref, vref = channel_reference(ch, dev["adc"])
            if ref == "external" and vref is None:
                raise ConfigError(f"{cpath}.vref_v", "required: the channel's reference is external "
                                  "(give vref_v here or in adc)", line_of(raw(i)))
        sensor = ch["sensor"]
        if sensor == "thermocouple":
            temperature_ref(ch["junction_channel"], "junction_channel", i, ch["name"])
        if sensor == "strain_gauge":
            th = ch["thermal"]
            if th is not None:
                temperature_ref(th["temperature_channel"], "thermal.temperature_channel", i,
                                ch["name"])
            tv = ch["transverse"]
            if tv is not None:
                other = by_name.get(tv["pair"])
                where = f"{cpath}.transverse.pair"
                if other is None or other["sensor"] != "strain_gauge" or tv["pair"] == ch["name"]:
                    raise ConfigError(where, f"{tv['pair']!r} must be another strain_gauge channel "
                                      f"on device {dev['name']!r}", line_of(raw(i), "transverse"))
                back = other.get("transverse")
                if back is None or back["pair"] != ch["name"] or back["kt"] != tv["kt"]:
                    raise ConfigError(where, f"the pair must be declared on both gauges with the "
                                      f"same kt: give {tv['pair']!r} transverse: {{kt: {tv['kt']:g}, "
                                      f"pair: {ch['name']}}}", line_of(raw(i), "transverse"))
    # cold-junction links must not go round in a circle
    for i, ch in enumerate(chans):
        seen = [ch["name"]]
        cur = ch
        while cur["sensor"] == "thermocouple" and cur["junction_channel"] is not None:
            nxt = cur["junction_channel"]
            if nxt in seen:
                raise ConfigError(f"{path}.channels[{i}].junction_channel", "cold-junction links "
                                  f"form a loop: {' -> '.join(seen + [nxt])}",
                                  line_of(raw(i), "junction_channel"))
            seen.append(nxt)
            cur = by_name[nxt]

    # derived values: inputs exist, outputs do not collide
    raw_der = src.get("derived") if isinstance(src, dict) else None
    raw_der = raw_der if isinstance(raw_der, list) else []
    columns: dict[str, str] = {c["name"]: ("microstrain" if c["sensor"] == "strain_gauge" else
                                           "other") for c in chans}
    for j, d in enumerate(dev["derived"]):
        dpath = f"{path}.derived[{j}]"
        rd = raw_der[j] if j < len(raw_der) else src
        key = "gauges" if d["kind"] == "rosette" else "gauge"
        for name in derived_inputs(d):
            if columns.get(name) != "microstrain":
                what = "no such channel" if name not in columns else "not a strain value"
                raise ConfigError(f"{dpath}.{key}", f"{name!r}: {what}; inputs must be strain_gauge "
                                  "channels or microstrain outputs of earlier derived entries on "
                                  f"device {dev['name']!r}", line_of(rd, key))
            if d["kind"] == "rosette" and d["kt"] != 0 and by_name.get(name, {}).get("transverse"):
                raise ConfigError(f"{dpath}.kt", f"gauge {name!r} already has a transverse "
                                  "correction: Kt would be corrected twice", line_of(rd, "kt"))
        for out, unit, _ in derived_outputs(d):
            if not _NAME_RE.match(out):
                raise ConfigError(f"{dpath}.name", f"column name {out!r} is too long or not plain "
                                  "(63 characters at most)", line_of(rd, "name"))
            if out in columns:
                raise ConfigError(f"{dpath}.name", f"derived column {out!r} collides with a "
                                  f"channel or derived column of the same name on device "
                                  f"{dev['name']!r}", line_of(rd, "name"))
            columns[out] = unit


DEVICE_SECTION = Section({
    "name": Field(_name, doc="device name (fixed key)"),
    "driver": Field(str, doc="driver plugin name (fixed key; see `straind drivers`)"),
    "description": Field(str, ""),
    "sample_rate_hz": Field(float, doc="samples per second per channel", unit="Hz", min=0,
                            min_exclusive=True, max=100_000),
    "block_samples": Field(int, 0, doc="samples per block; 0 = a tenth of a second", min=0,
                           max=1_000_000),
    "stall_timeout_s": Field(float, 5.0, doc="no data for this long = driver fault", unit="s",
                             min=0.1),
    "options": Field(dict, {}, doc="driver options"),
    "adc": Section(ADC_SECTION.fields, check=_check_adc, default=None),
    "channels": ListOf(Field(_channel), min_items=1, max_items=256, unique_key="name"),
    "derived": ListOf(Field(_derived), default=[], max_items=256,
                      doc="values computed per block from the measured channels"),
}, check=_check_device)

STORAGE_SECTION = Section({
    "path": Field(str, doc="directory for HDF5 segments (fixed key)"),
    "segment_hours": Field(float, 24.0, unit="h", min=0.0005, max=24 * 31),
    "segment_max_mb": Field(float, 2048.0, unit="MB", min=1),
    "flush_interval_s": Field(float, 1.0, unit="s", min=0.01, max=60),
    "compression": Field(str, "none", choices=("none", "lzf", "gzip")),
    "value_dtype": Field(str, "float64", choices=("float64", "float32")),
    "queue_mb": Field(float, 256.0, unit="MB", min=1),
    "state_file": Field(str, "", doc="tare and calibration state; default <path>/straind-state.json"),
    "fsync": Field(bool, True, doc="fsync each flush and each new segment: a power cut loses "
                   "at most about one flush interval"),
    "low_space_mb": Field(float, 500.0, unit="MB", min=0,
                          doc="free space below this raises low_space (0 = no check)"),
    "retention_days": Field(float, 0.0, unit="d", min=0,
                            doc="delete closed segments older than this (0 = keep all)"),
    "retention_max_gb": Field(float, 0.0, unit="GB", min=0,
                              doc="delete the oldest closed segments beyond this total "
                                  "(0 = no limit)"),
})

CLOCK_SECTION = Section({
    "sync_check": Field(str, "adjtimex", choices=("adjtimex", "none"),
                        doc="how to tell that the wall clock is synchronised; none = assume it is"),
    "reanchor_on_sync": Field(bool, True, doc="when the clock becomes synchronised, restart the "
                              "devices anchored before it (short gap, new segment)"),
})

def _check_alarm(a: dict, path: str, src: Any) -> None:
    if a["kind"].startswith("rate_") and a["rate_window_s"] is None:
        raise ConfigError(f"{path}.rate_window_s", f"required for kind {a['kind']!r} (the rate is "
                          "the least-squares slope over this window)", line_of(src))
    if not a["kind"].startswith("rate_") and a["rate_window_s"] is not None:
        raise ConfigError(f"{path}.rate_window_s", f"only used by the rate kinds, not "
                          f"{a['kind']!r}", line_of(src, "rate_window_s"))


#: One `alarms[]` entry (see straind.alarms for the exact raise/clear semantics).
ALARM_RULE = Section({
    "name": Field(str, "", doc="alarm name in events and status; default <channel>.<kind>"),
    "channel": Field(str, doc="CHANNEL or DEVICE/CHANNEL, measured or derived"),
    "kind": Field(str, doc="high, low, rate_high, rate_low",
                  choices=("high", "low", "rate_high", "rate_low")),
    "limit": Field(float, doc="threshold in the channel's unit (rate kinds: unit per hour)"),
    "hysteresis": Field(float, 0.0, min=0, doc="the clear threshold is limit -/+ hysteresis"),
    "hold_s": Field(float, 0.0, min=0, unit="s", doc="raise condition must persist this long"),
    "clear_hold_s": Field(float, None, nullable=True, min=0, unit="s",
                          doc="clear condition must persist this long; default hold_s"),
    "rate_window_s": Field(float, None, nullable=True, min=0, min_exclusive=True, unit="s",
                           doc="least-squares window of the rate (rate kinds only)"),
    "severity": Field(str, "warning", choices=("info", "warning", "critical")),
    "description": Field(str, ""),
}, check=_check_alarm)


def device_columns(dev: Mapping[str, Any]) -> list[tuple[str, str]]:
    """(name, unit) of every value column of a device: measured channels, then derived."""
    cols = []
    for ch in dev["channels"]:
        if ch["sensor"] == "strain_gauge":
            unit = "microstrain"
        elif ch["sensor"] in TEMPERATURE_SENSORS:
            unit = "degC"
        else:
            unit = str(ch.get("unit", ""))
        cols.append((ch["name"], unit))
    for d in dev.get("derived") or []:
        cols += [(n, u) for n, u, _ in derived_outputs(d)]
    return cols


def resolve_channel(devices: list[Mapping[str, Any]], name: str) -> tuple[str, str]:
    """CHANNEL or DEVICE/CHANNEL -> (device, channel); ValueError when absent or ambiguous."""
    dev_name, _, ch_name = name.rpartition("/")
    hits = [(d["name"], ch_name) for d in devices
            if (not dev_name or d["name"] == dev_name)
            and ch_name in [c for c, _ in device_columns(d)]]
    if not hits:
        raise ValueError(f"no channel or derived column {name!r} (use CHANNEL or DEVICE/CHANNEL)")
    if len(hits) > 1:
        raise ValueError(f"channel name {name!r} is on several devices; use DEVICE/CHANNEL")
    return hits[0]


def _check_alarms(data: dict, raw: Any) -> None:
    raw_alarms = raw.get("alarms") if isinstance(raw, dict) else None
    raw_alarms = raw_alarms if isinstance(raw_alarms, list) else []
    seen: dict[str, int] = {}
    for i, a in enumerate(data.get("alarms") or []):
        ra = raw_alarms[i] if i < len(raw_alarms) else raw
        try:
            dev, ch = resolve_channel(data["devices"], a["channel"])
        except ValueError as exc:
            raise ConfigError(f"alarms[{i}].channel", str(exc), line_of(ra, "channel")) from None
        a["device"], a["column"] = dev, ch
        if not a["name"]:
            a["name"] = f"{a['channel']}.{a['kind']}"
        if a["name"] in seen:
            raise ConfigError(f"alarms[{i}].name", f"duplicate alarm name {a['name']!r} (also "
                              f"alarms[{seen[a['name']]}]); give each rule a name",
                              line_of(ra, "name") or line_of(ra))
        seen[a["name"]] = i


def config_warnings(data: Mapping[str, Any]) -> list[str]:
    """Plausibility warnings (not errors): gauge factors far from their gauge type's range."""
    out = []
    for i, dev in enumerate(data["devices"]):
        for j, ch in enumerate(dev["channels"]):
            if ch["sensor"] == "strain_gauge" and ch.get("gauge_type"):
                msg = gauge_factor_warning(ch["gauge_type"], ch["gauge_factor"])
                if msg:
                    out.append(f"devices[{i}].channels[{j}].gauge_factor ({dev['name']}/"
                               f"{ch['name']}): {msg}")
    return out


#: Top-level sections other modules add (e.g. `mqtt`); name -> Section.
EXTRA_SECTIONS: dict[str, Any] = {}


def register_section(name: str, spec: Any) -> None:
    """Let a module (feed, alarms ...) own a top-level configuration section."""
    EXTRA_SECTIONS[name] = spec


def _mqtt_section() -> Section:
    """The `mqtt` section is owned by the feed; absent means no feed."""
    import dataclasses

    from straind.feed import MQTT_SECTION
    return dataclasses.replace(MQTT_SECTION, default=None)


def _schema() -> Section:
    return Section({
        "station": Section({
            "id": Field(_name, doc="station id (fixed key): file names, MQTT topics"),
            "description": Field(str, ""),
        }),
        "storage": STORAGE_SECTION,
        "control": Section({
            "socket": Field(str, "", doc="control socket path; default <storage.path>/straind.sock"),
        }),
        "clock": CLOCK_SECTION,
        "devices": ListOf(DEVICE_SECTION, min_items=1, max_items=64, unique_key="name"),
        "alarms": ListOf(ALARM_RULE, default=[], max_items=1024,
                         doc="limit alarms on measured or derived channels"),
        "mqtt": _mqtt_section(),
        **EXTRA_SECTIONS,
    })


CONFIG_SCHEMA = _schema  # a function: sections registered later are included


@dataclass
class Config:
    """A validated configuration. `data` is plain dicts and lists with every default filled in."""

    data: dict[str, Any]
    text: str
    source: str
    base_dir: Path = field(default_factory=Path.cwd)

    @property
    def station_id(self) -> str:
        return self.data["station"]["id"]

    @property
    def devices(self) -> list[dict[str, Any]]:
        return self.data["devices"]

    @property
    def storage(self) -> dict[str, Any]:
        return self.data["storage"]

    def resolve(self, p: str) -> Path:
        """Paths in the file are relative to the file's directory."""
        path = Path(os.path.expanduser(p))
        return path if path.is_absolute() else (self.base_dir / path)


def _driver_pass(data: dict, raw: Any, load_driver: Callable[[str], type] | None) -> None:
    """Validate every device's driver options and channel options with the driver's schema."""
    from straind.drivers.base import ChannelSetup, DeviceSetup, DriverError
    from straind.plugins import load_driver as default_loader

    loader = load_driver or default_loader
    raw_devices = raw.get("devices", [])
    for i, dev in enumerate(data["devices"]):
        path = f"devices[{i}]"
        raw_dev = raw_devices[i]
        try:
            cls = loader(dev["driver"])
        except KeyError:
            from straind.plugins import driver_names
            raise ConfigError(f"{path}.driver", f"no driver named {dev['driver']!r} is installed "
                              f"(installed: {', '.join(driver_names()) or 'none'})",
                              line_of(raw_dev, "driver")) from None
        except DriverError as exc:
            raise ConfigError(f"{path}.driver", str(exc), line_of(raw_dev, "driver")) from None
        dev["options"] = validate(cls.OPTIONS, raw_dev.get("options", {}) or {},
                                  f"{path}.options", line_of(raw_dev, "options"))
        raw_chs = raw_dev.get("channels", [])
        for j, ch in enumerate(dev["channels"]):
            raw_ch = raw_chs[j]
            ch["options"] = validate(cls.CHANNEL_OPTIONS, raw_ch.get("options", {}) or {},
                                     f"{path}.channels[{j}].options", line_of(raw_ch, "options"))
        info = cls.static_info(dev["options"])
        if info.native == "code24" and dev["adc"] is None:
            raise ConfigError(f"{path}.adc", "required: driver delivers converter codes, so the "
                              "converter's gain and reference must be given", line_of(raw_dev))
        if dev["block_samples"] == 0:
            dev["block_samples"] = max(1, int(round(dev["sample_rate_hz"] / 10)))
        setup = DeviceSetup(
            name=dev["name"], sample_rate_hz=dev["sample_rate_hz"],
            block_samples=dev["block_samples"],
            channels=tuple(ChannelSetup(c["name"], k, c, c["options"])
                           for k, c in enumerate(dev["channels"])),
            config=dev)
        try:
            cls.check_setup(setup, dev["options"], path)
        except ConfigError as exc:
            if exc.line is None:
                raise ConfigError(exc.path, exc.reason, line_of(raw_dev)) from None
            raise


#: Hooks run after validation for cross-section rules; each gets (data, raw) and may raise.
POST_CHECKS: list[Callable[[dict, Any], None]] = [_check_alarms]


def load_config_text(text: str, source: str = "<config>", base_dir: Path | None = None,
                     load_driver: Callable[[str], type] | None = None) -> Config:
    """Validate configuration text; raise ConfigError naming the key path and line."""
    raw = load_yaml_text(text, source)
    if not isinstance(raw, dict):
        raise ConfigError("", "the configuration must be a YAML mapping at the top level", 1)
    data = validate(_schema(), raw)
    _driver_pass(data, raw, load_driver)
    for check in POST_CHECKS:
        check(data, raw)
    return Config(data=data, text=text, source=source, base_dir=base_dir or Path.cwd())


def load_config(path: str | os.PathLike[str],
                load_driver: Callable[[str], type] | None = None) -> Config:
    """Read and validate a configuration file."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(str(p), f"cannot read configuration: {exc.strerror or exc}") from None
    return load_config_text(text, str(p), p.resolve().parent, load_driver)


_SECRET_RE = re.compile(r"^(\s*(?:-\s+)?(?:password|passwd|secret|token)\s*:\s*)(\S.*)$",
                        re.IGNORECASE | re.MULTILINE)


def redact_text(text: str) -> str:
    """The configuration text with inline secrets replaced, for the HDF5 copy and logs."""
    return _SECRET_RE.sub(lambda m: m.group(1) + '"<redacted>"', text)
