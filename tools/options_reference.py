#!/usr/bin/env python3
"""Print the options of every installed driver as Markdown tables (from their schemas).

    python tools/options_reference.py > driver-options.md

The README's driver option tables are made with this, so they cannot drift from the code.
"""

from __future__ import annotations

import sys
from typing import Any

from straind.plugins import list_drivers, load_driver
from straind.schema import _MISSING, Field, ListOf, Section


def _default(spec: Any) -> str:
    d = getattr(spec, "default", _MISSING)
    if d is _MISSING:
        return "required"
    if d is None:
        return "-"
    if isinstance(d, bool):
        return str(d).lower()
    return f"{d!r}" if isinstance(d, str) else str(d)


def _kind(spec: Any) -> str:
    if isinstance(spec, Section):
        return "mapping"
    if isinstance(spec, ListOf):
        return "list"
    k = getattr(spec, "kind", None)
    name = {float: "number", int: "integer", str: "text", bool: "bool", list: "list",
            dict: "mapping"}.get(k, "value")
    if getattr(spec, "choices", None):
        name = ", ".join(str(c) for c in spec.choices)
    unit = getattr(spec, "unit", "")
    return f"{name}, {unit}" if unit else name


def _rows(section: Section, prefix: str = "") -> list[str]:
    out = []
    for key, spec in section.fields.items():
        doc = getattr(spec, "doc", "") or ""
        out.append(f"| `{prefix}{key}` | {_kind(spec)} | {_default(spec)} | {doc} |")
        if isinstance(spec, Section):
            out += _rows(spec, prefix + key + ".")
    return out


def main() -> int:
    for d in list_drivers():
        if d.error:
            print(f"### `{d.name}`: unavailable ({d.error})\n")
            continue
        cls = load_driver(d.name)
        print(f"### `{d.name}`\n\n{cls.summary}\n")
        for title, sec in (("device options (`devices[].options`)", cls.OPTIONS),
                           ("channel options (`devices[].channels[].options`)",
                            cls.CHANNEL_OPTIONS)):
            if not sec.fields:
                continue
            print(f"{title}:\n\n| key | type / unit | default | meaning |\n|---|---|---|---|")
            print("\n".join(_rows(sec)))
            print()
        kinds = getattr(sys.modules[cls.__module__], "TRUTH_KINDS", None)
        if kinds:
            print("truth scenarios (`options.truth`, times in truth time: sample time x "
                  "`time_scale`):\n")
            print("| kind | key | type / unit | default | meaning |\n|---|---|---|---|---|")
            for kind, sec in kinds.items():
                for row in _rows(sec):
                    if row.startswith("| `kind`"):
                        continue
                    print(f"| `{kind}` " + row)
            print()
    return 0


if __name__ == "__main__":
    sys.exit(main())
