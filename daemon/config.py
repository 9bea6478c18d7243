"""Loading and validating the straind configuration (YAML).

One function, `load_config`, turns a file (or text) into a validated, defaults-filled `Config`, or
raises `ConfigError` whose message names the key path and the line, e.g.
``devices[0].channels[2].gauge_factor (line 31): required key is missing``.
Driver options are validated by the driver's own schema, so unknown driver options are rejected
just like unknown core keys. The fixed, scriptable keys are station.id, storage.path,
devices[].name, devices[].driver and devices[].channels[].name.
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

from straind.schema import (ConfigError, Field, ListOf, Section, line_of,
                            load_yaml_text, validate)

__all__ = ["Config", "load_config", "load_config_text", "CONFIG_SCHEMA", "SENSOR_SECTIONS", "redact_text",
           "GAINS", "BRIDGES", "register_section"]

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

#: sensor name -> channel schema; measurement modules add their sensors here.
SENSOR_SECTIONS: dict[str, Section] = {
    "strain_gauge": STRAIN_GAUGE,
    "bridge_transducer": BRIDGE_TRANSDUCER,
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
})

STORAGE_SECTION = Section({
    "path": Field(str, doc="directory for HDF5 segments (fixed key)"),
    "segment_hours": Field(float, 24.0, unit="h", min=0.0005, max=24 * 31),
    "segment_max_mb": Field(float, 2048.0, unit="MB", min=1),
    "flush_interval_s": Field(float, 1.0, unit="s", min=0.01, max=60),
    "compression": Field(str, "none", choices=("none", "lzf", "gzip")),
    "value_dtype": Field(str, "float64", choices=("float64", "float32")),
    "queue_mb": Field(float, 256.0, unit="MB", min=1),
    "state_file": Field(str, "", doc="tare and calibration state; default <path>/straind-state.json"),
})

#: Top-level sections other modules add (e.g. `mqtt`); name -> Section.
EXTRA_SECTIONS: dict[str, Any] = {}


def register_section(name: str, spec: Any) -> None:
    """Let a module (feed, alarms ...) own a top-level configuration section."""
    EXTRA_SECTIONS[name] = spec


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
        "devices": ListOf(DEVICE_SECTION, min_items=1, max_items=64, unique_key="name"),
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
POST_CHECKS: list[Callable[[dict, Any], None]] = []


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
