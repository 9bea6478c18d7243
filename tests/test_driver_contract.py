"""One contract test over every registered driver plugin (built-in or third-party)."""

from __future__ import annotations

import numpy as np
import pytest

from straind.block import Block
from straind.drivers.base import Driver, DriverInfo, DriverIOError
from straind.plugins import driver_names, list_drivers, load_driver

NAMES = driver_names()


def test_builtins_are_registered() -> None:
    for name in ("simulated-bridge", "serial-frames", "serial-lines"):
        assert name in NAMES


@pytest.mark.parametrize("name", NAMES)
def test_driver_contract(name: str) -> None:
    cls = load_driver(name)
    assert issubclass(cls, Driver)
    assert cls.summary, "a driver needs a one-line summary for `straind drivers`"
    example = cls.example()
    assert example is not None, f"{name} provides no example() for the contract test"
    setup, options = example
    info = cls.static_info(options)
    assert isinstance(info, DriverInfo)
    assert info.native in ("code24", "float")
    assert info.max_channels >= len(setup.channels)
    cls.check_setup(setup, options, "devices[0]")
    drv = cls(setup, options)
    assert isinstance(drv.describe(), DriverInfo)  # works before open()
    drv.close()  # close before open is safe
    drv.open()
    try:
        got = None
        for _ in range(40):
            got = drv.read_block(timeout_s=0.25)
            if got is not None:
                break
        if got is not None:
            assert isinstance(got, Block)
            assert got.data.shape == (setup.block_samples, len(setup.channels))
            assert got.quality.shape == got.data.shape and got.quality.dtype == np.uint8
            assert got.data.dtype == (np.int32 if info.native == "code24" else np.float64)
            assert got.period_ns == setup.period_ns
            assert got.t0_ns is None  # the service's timebase stamps times
            assert got.start_index >= 0 and got.host_wall_ns > 0
    finally:
        drv.close()
        drv.close()  # closing twice is safe
    with pytest.raises(DriverIOError):
        drv.read_block(timeout_s=0.01)


def test_listing_reports_unavailable_driver_without_breaking_others(monkeypatch) -> None:
    import straind.plugins as plugins
    from importlib.metadata import EntryPoint

    real = plugins._entry_points()
    broken = EntryPoint("broken-thing", "straind_no_such_module:Driver", plugins.GROUP)
    monkeypatch.setattr(plugins, "_entry_points", lambda: {**real, "broken-thing": broken})
    rows = {d.name: d for d in list_drivers()}
    assert rows["broken-thing"].error and "No module named" in rows["broken-thing"].error
    assert rows["simulated-bridge"].error is None and rows["simulated-bridge"].summary
