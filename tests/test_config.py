"""Configuration validation: every bad file gets one message naming the key path and the line."""

from __future__ import annotations

import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from straind.config import load_config, load_config_text, redact_text
from straind.schema import ConfigError

GOOD = textwrap.dedent("""\
    station:
      id: rig-a
    storage:
      path: ./data
    devices:
      - name: dev0
        driver: simulated-bridge
        sample_rate_hz: 100
        adc: {gain: 128}
        channels:
          - name: g1
            sensor: strain_gauge
            gauge_factor: 2.0
            gauge_ohm: 350
            bridge: quarter
            excitation_v: 5
            options: {truth: {kind: constant, value: 100}}
          - name: g2
            sensor: strain_gauge
            gauge_factor: 2.1
            gauge_ohm: 120
            bridge: half-poisson
            poisson: 0.3
            excitation_v: 2.5
            options: {truth: {kind: constant, value: 100}}
          - name: g3
            sensor: strain_gauge
            gauge_factor: 2.1
            gauge_ohm: 120
            bridge: full-bending
            excitation_v: 2.5
            options: {truth: {kind: constant, value: 100}}
    """)


def _bad(text: str) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        load_config_text(text)
    return info.value


def test_good_config_fills_defaults() -> None:
    cfg = load_config_text(GOOD)
    dev = cfg.devices[0]
    assert dev["block_samples"] == 10  # a tenth of a second at 100 Hz
    assert dev["channels"][0]["wiring"] == "3-wire"
    assert dev["channels"][0]["completion_ohm"] == 350.0
    assert dev["adc"]["reference"] == "excitation"
    assert cfg.storage["flush_interval_s"] == 1.0
    assert cfg.station_id == "rig-a"


def test_unknown_key_named_with_path_and_line() -> None:
    err = _bad(GOOD.replace("    bridge: quarter\n", "    bridge: quarter\n        colour: red\n"))
    assert err.path == "devices[0].channels[0].colour"
    assert err.line == 16
    assert "unknown key" in str(err) and "line 16" in str(err)


def test_wrong_type_named() -> None:
    err = _bad(GOOD.replace("gauge_factor: 2.0", "gauge_factor: two"))
    assert err.path == "devices[0].channels[0].gauge_factor"
    assert "expected a number" in str(err)
    assert err.line == 13


def test_missing_gauge_factor_named() -> None:
    err = _bad(GOOD.replace("        gauge_factor: 2.0\n", ""))
    assert err.path == "devices[0].channels[0].gauge_factor"
    assert "required" in str(err)


def test_gain_3_rejected() -> None:
    err = _bad(GOOD.replace("adc: {gain: 128}", "adc: {gain: 3}"))
    assert err.path == "devices[0].adc.gain"
    assert "must be one of" in str(err) and "128" in str(err)


def test_poisson_required_for_poisson_bridge() -> None:
    err = _bad(GOOD.replace("        poisson: 0.3\n", ""))
    assert err.path == "devices[0].channels[1].poisson"


def test_two_wire_only_for_quarter() -> None:
    err = _bad(GOOD.replace("bridge: full-bending", "bridge: full-bending\n        wiring: 2-wire"))
    assert err.path == "devices[0].channels[2].wiring"


def test_duplicate_channel_names() -> None:
    err = _bad(GOOD.replace("name: g2", "name: g1"))
    assert err.path == "devices[0].channels[1].name"
    assert "duplicate" in str(err)


def test_unknown_driver_lists_installed() -> None:
    err = _bad(GOOD.replace("driver: simulated-bridge", "driver: no-such-thing"))
    assert err.path == "devices[0].driver"
    assert "simulated-bridge" in str(err)


def test_driver_option_validated_by_driver() -> None:
    err = _bad(GOOD.replace("adc: {gain: 128}", "adc: {gain: 128}\n    options: {sed: 1}"))
    assert err.path == "devices[0].options.sed"


def test_missing_station_id() -> None:
    err = _bad(GOOD.replace("  id: rig-a\n", "  description: x\n"))
    assert err.path == "station.id"


def test_yaml_syntax_error_has_line() -> None:
    err = _bad(GOOD.replace("gauge_ohm: 350", "gauge_ohm: [350"))
    assert err.line is not None and "YAML" in str(err)


def test_duplicate_yaml_key() -> None:
    err = _bad(GOOD.replace("  path: ./data\n", "  path: ./data\n  path: ./other\n"))
    assert "duplicate key" in str(err)


def test_transducer_needs_rated_output_or_certificate() -> None:
    text = GOOD.replace("""      - name: g3
        sensor: strain_gauge
        gauge_factor: 2.1
        gauge_ohm: 120
        bridge: full-bending
""", """      - name: g3
        sensor: bridge_transducer
        quantity: force
        unit: kN
        capacity: 10
""")
    assert text != GOOD
    err = _bad(text)
    assert err.path == "devices[0].channels[2].rated_output_mv_per_v"


def test_relative_paths_resolve_against_file(tmp_path: Path) -> None:
    p = tmp_path / "sub" / "rig.yaml"
    p.parent.mkdir()
    p.write_text(GOOD)
    cfg = load_config(p)
    assert cfg.resolve(cfg.storage["path"]) == p.parent / "data"


def test_redact_text_hides_passwords() -> None:
    text = "mqtt:\n  host: x\n  password: hunter2\n  username: bob\n"
    out = redact_text(text)
    assert "hunter2" not in out and "bob" in out and "<redacted>" in out


@pytest.mark.parametrize("change,key", [
    (("adc: {gain: 128}", "adc: {gain: 3}"), "devices[0].adc.gain"),
    (("    bridge: quarter\n", "    bridge: quarter\n        colour: red\n"),
     "devices[0].channels[0].colour"),
])
def test_cli_bad_config_exits_nonzero_and_writes_nothing(tmp_path: Path, change, key) -> None:
    p = tmp_path / "bad.yaml"
    p.write_text(GOOD.replace(*change).replace("./data", str(tmp_path / "data")))
    for cmd in ("check", "run"):
        r = subprocess.run([sys.executable, "-m", "straind.cli", cmd, "-c", str(p)],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 2, r.stderr
        assert key in r.stderr and "line" in r.stderr
        assert r.stderr.count("\n") == 1  # one clear message
    assert not (tmp_path / "data").exists()
