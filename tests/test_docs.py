"""The README documents every configuration key and every driver option (they cannot drift)."""

from __future__ import annotations

import re
from pathlib import Path

from straind import config as cfgmod
from straind.plugins import driver_names, load_driver
from straind.schema import ListOf, MappingOf, Section

README = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")
DEVELOPERS = (Path(__file__).resolve().parent.parent / "DEVELOPERS.md").read_text(encoding="utf-8")


def _keys(spec, out: set[str]) -> None:
    if isinstance(spec, Section):
        for k, sub in spec.fields.items():
            out.add(k)
            _keys(sub, out)
    elif isinstance(spec, ListOf):
        _keys(spec.item, out)
    elif isinstance(spec, MappingOf):
        _keys(spec.value, out)


def _documented(key: str) -> bool:
    return re.search(r"[`.]" + re.escape(key) + r"[`.\[]", README) is not None


def test_every_configuration_key_is_in_the_readme() -> None:
    keys: set[str] = set()
    _keys(cfgmod._schema(), keys)
    for sec in cfgmod.SENSOR_SECTIONS.values():
        _keys(sec, keys)
    missing = sorted(k for k in keys if not _documented(k))
    assert not missing, f"README lacks configuration keys: {missing}"


def test_every_driver_option_is_in_the_readme() -> None:
    missing = []
    for name in driver_names():
        cls = load_driver(name)
        for sec in (cls.OPTIONS, cls.CHANNEL_OPTIONS):
            keys: set[str] = set()
            _keys(sec, keys)
            missing += [f"{name}:{k}" for k in sorted(keys) if not _documented(k)]
    assert not missing, f"README lacks driver options: {missing}"


def test_readme_quick_start_and_safety() -> None:
    assert README.count(".venv/bin/straind run --duration") == 1
    assert "'.[test]'" in README and "-m pytest" in README
    assert "does not replace protective devices" in README
    ci = (Path(__file__).resolve().parent.parent / ".ci" / "run").read_text()
    test_cmd = next(line.strip() for line in README.splitlines() if "-m pytest" in line)
    assert test_cmd in ci  # CI runs exactly the README's test command
    assert "straind.drivers" in DEVELOPERS
