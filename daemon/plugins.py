"""Lazy discovery of driver plugins through the entry-point group ``straind.drivers``.

Nothing is imported until a driver is asked for by name; a plugin whose import fails is
reported as unavailable with the reason, and the others keep working.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib.metadata import EntryPoint, entry_points

from straind.drivers.base import Driver, DriverUnavailable

__all__ = ["GROUP", "DriverListing", "driver_names", "load_driver", "list_drivers"]

GROUP = "straind.drivers"


@dataclass(frozen=True)
class DriverListing:
    """One line of ``straind drivers``: summary when importable, reason when not."""

    name: str
    target: str
    summary: str | None
    error: str | None


def _entry_points() -> dict[str, EntryPoint]:
    found: dict[str, EntryPoint] = {}
    for ep in entry_points(group=GROUP):
        found.setdefault(ep.name, ep)
    return found


def driver_names() -> list[str]:
    """Names of every registered driver, importable or not."""
    return sorted(_entry_points())


def load_driver(name: str) -> type[Driver]:
    """Import and return the driver class registered as `name`.

    Raises KeyError for an unknown name and DriverUnavailable (with the import error) when the
    plugin is registered but cannot be loaded.
    """
    eps = _entry_points()
    if name not in eps:
        raise KeyError(name)
    ep = eps[name]
    try:
        cls = ep.load()
    except Exception as exc:  # any import-time failure of a third-party plugin
        raise DriverUnavailable(f"driver {name!r} ({ep.value}) cannot be loaded: "
                                f"{type(exc).__name__}: {exc}") from exc
    if not (isinstance(cls, type) and issubclass(cls, Driver)):
        raise DriverUnavailable(f"driver {name!r} ({ep.value}) is not a straind Driver subclass")
    return cls


def list_drivers() -> list[DriverListing]:
    """Every registered driver with its one-line summary or the reason it is unavailable."""
    out = []
    for name, ep in sorted(_entry_points().items()):
        try:
            cls = load_driver(name)
        except DriverUnavailable as exc:
            out.append(DriverListing(name, ep.value, None, str(exc)))
            continue
        out.append(DriverListing(name, ep.value, cls.summary or cls.__doc__ or "", None))
    return out
