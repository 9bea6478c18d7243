"""Short versions of the benchmark scripts in tools/: each runs end to end on small settings and
its correctness checks hold (nothing lost, every row stored). No timing is asserted here: the
printed speeds are for a person reading them on a quiet machine."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

TOOLS = Path(__file__).resolve().parents[1] / "tools"


def _run(script: str, *args: str, timeout_s: float = 180) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, str(TOOLS / script), *args], capture_output=True,
                          text=True, timeout=timeout_s)


@pytest.mark.parametrize("mode", [[], ["--corrections"], ["--corrections", "--derived"]],
                         ids=["plain", "corrections", "derived"])
def test_bench_pipeline_short(tmp_path: Path, mode: list[str]) -> None:
    r = _run("bench_pipeline.py", "--channels", "6", "--seconds", "0.3", "--realtime-s", "0.3",
             "--dir", str(tmp_path), *mode)
    assert r.returncode == 0, r.stderr
    # the script warns when a row it submitted did not reach the file
    assert "warning" not in r.stderr, r.stderr
    out = r.stdout
    assert re.search(r"full pipeline .* 6 ch, .*: [0-9.]+ M channel-samples/s", out), out
    assert re.search(r"ratio [0-9.]+", out), out
    assert re.search(r"real time 6 ch x 10 000 S/s .* using [0-9.]+ % of one core", out), out
    assert list(tmp_path.glob("p*/*.h5"))  # it wrote real files into the directory it was given


def test_bench_pipeline_refuses_derived_on_too_few_channels() -> None:
    r = _run("bench_pipeline.py", "--channels", "4", "--derived")
    assert r.returncode == 2 and "--channels 6" in r.stderr


def test_bench_feed_short() -> None:
    # starts its own Mosquitto on a free port and a subscriber process
    r = _run("bench_feed.py", "--channels", "4", "--duration", "1", "--max-blocks", "40",
             "--repeats", "2", "--json")
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    phases = {p["phase"]: p for p in rep["results"]}
    flat = ["max-feed-1", "max-paho-1", "max-feed-2", "max-paho-2"]
    assert set(phases) == {"outbox", "rt-feed", "rt-paho", "warm-up", "max-feed-cold", *flat}
    for name in ("rt-feed", "rt-paho", "warm-up", "max-feed-cold", *flat):
        p = phases[name]
        assert p["received"] == p["expected"] > 0 and p["lost"] == 0 and p["duplicates"] == 0, p
    assert phases["rt-feed"]["outbox_left"] == 0
    for name in ("max-feed-cold", "max-feed-1", "max-feed-2"):
        assert not any(phases[name]["dropped"].values()), phases[name]["dropped"]
    assert len(rep["feed_over_paho_each"]) == 2 and rep["cold_feed_over_paho"] > 0
    assert min(rep["feed_over_paho_each"]) <= rep["feed_over_paho"] <= max(rep["feed_over_paho_each"])


def test_bench_serial_short() -> None:
    r = _run("bench_serial.py", "--channels", "4", "--seconds", "0.5")
    assert r.returncode == 0, r.stderr
    out = r.stdout
    assert re.search(r"ratio parsed/raw: [0-9.]+", out), out
    assert ", 0 CRC errors" in out, out
    assert "lost frames 0, CRC errors 0" in out, out
