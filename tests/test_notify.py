"""Service-manager notifications and the earned watchdog: READY, STATUS, WATCHDOG, RELOADING,
STOPPING over a datagram socket the test owns; a hung acquisition loop stops the pings."""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

from fault_driver import install_fault_driver
from helpers import ServiceProcess, sim_device, write_config
from straind.notify import Heartbeats, Notifier, watchdog_usec_from_env


class NotifyListener:
    """A datagram socket like the service manager's; collects (monotonic s, fields) messages."""

    def __init__(self, path: Path | None = None):
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        if path is None:                       # abstract address, written '@name' in the env
            name = f"straind-test-{uuid.uuid4().hex}"
            self.sock.bind("\0" + name)
            self.address = "@" + name
        else:
            self.sock.bind(str(path))
            self.address = str(path)
        self.sock.settimeout(0.05)
        self.messages: list[tuple[float, dict[str, str]]] = []

    def collect(self, seconds: float) -> list[tuple[float, dict[str, str]]]:
        end = time.monotonic() + seconds
        got = []
        while time.monotonic() < end:
            try:
                data = self.sock.recv(65536)
            except socket.timeout:
                continue
            fields = dict(line.split("=", 1) for line in data.decode().split("\n") if line)
            got.append((time.monotonic(), fields))
        self.messages.extend(got)
        return got

    def wait_for(self, key: str, timeout_s: float = 20.0) -> dict[str, str]:
        end = time.monotonic() + timeout_s
        while time.monotonic() < end:
            for _, f in self.collect(0.1):
                if key in f:
                    return f
        raise AssertionError(f"no {key} within {timeout_s} s; got {self.messages[-5:]}")

    def close(self) -> None:
        self.sock.close()


def test_notifier_sends_to_path_and_abstract_addresses(tmp_path: Path) -> None:
    for listener in (NotifyListener(tmp_path / "n.sock"), NotifyListener()):
        n = Notifier({"NOTIFY_SOCKET": listener.address, "WATCHDOG_USEC": "3000000"})
        assert n.enabled and n.ping_interval_s == pytest.approx(1.5)  # half the timeout
        assert n.ready("up") and n.watchdog() and n.reloading() and n.stopping("bye")
        assert n.status("up")                 # unchanged STATUS is not sent again
        got = [f for _, f in listener.collect(0.3)]
        assert got[0] == {"READY": "1", "STATUS": "up"}
        assert got[1] == {"WATCHDOG": "1"}
        assert got[2]["RELOADING"] == "1"
        usec = int(got[2]["MONOTONIC_USEC"])  # CLOCK_MONOTONIC in microseconds
        assert abs(usec - time.monotonic_ns() // 1000) < 5_000_000
        assert got[3] == {"STOPPING": "1", "STATUS": "bye"}
        assert len(got) == 4
        n.close()
        listener.close()


def test_no_manager_and_foreign_watchdog_pid() -> None:
    n = Notifier({})
    assert not n.enabled and not n.ready() and n.ping_interval_s is None
    env = {"NOTIFY_SOCKET": "@x", "WATCHDOG_USEC": "1000000", "WATCHDOG_PID": str(os.getpid() + 1)}
    assert watchdog_usec_from_env(env) is None          # meant for another process
    env["WATCHDOG_PID"] = str(os.getpid())
    assert watchdog_usec_from_env(env) == 1_000_000
    assert watchdog_usec_from_env({"WATCHDOG_USEC": "0"}) is None


def test_heartbeats_stale() -> None:
    now = [100.0]
    hb = Heartbeats(clock=lambda: now[0])
    hb.arm("a")
    hb.arm("b")
    now[0] = 100.4
    hb.beat("a")
    now[0] = 101.2
    assert hb.stale(1.0, ["a", "b"]) == ["b"]
    assert hb.stale(1.0, ["never"]) == ["never"]
    hb.beat("b")
    assert hb.stale(1.0, ["a", "b"]) == []


def _gauge(name: str, value: float) -> dict:
    return {"name": name, "sensor": "strain_gauge", "gauge_factor": 2.0, "gauge_ohm": 350,
            "bridge": "quarter", "excitation_v": 5.0,
            "options": {"truth": {"kind": "constant", "value": value}}}


def _pings(msgs: list[tuple[float, dict[str, str]]]) -> list[float]:
    return [t for t, f in msgs if f.get("WATCHDOG") == "1"]


def test_watchdog_pings_come_from_the_acquisition_loops(tmp_path: Path) -> None:
    env = install_fault_driver(tmp_path / "site")
    hang = tmp_path / "hang"
    good = sim_device([_gauge("g1", 100.0)], rate_hz=100, name="good")
    stuck = sim_device([_gauge("g2", 200.0)], rate_hz=100, name="stuck")
    stuck["driver"] = "fault-sim"
    stuck["options"]["hang_file"] = str(hang)
    cfg = write_config(tmp_path, [good, stuck])
    listener = NotifyListener()
    env.update(NOTIFY_SOCKET=listener.address, WATCHDOG_USEC="1000000")  # ping every 0.5 s
    try:
        with ServiceProcess(cfg, tmp_path / "straind.sock", env=env) as svc:
            ready = listener.wait_for("READY")
            assert "devices" in ready["STATUS"]
            healthy = listener.collect(2.5)
            assert len(_pings(healthy)) >= 3
            hang.touch()          # one of the two device loops hangs inside read_block
            listener.collect(1.2)  # pings already on their way, and one interval
            during = listener.collect(2.5)
            assert _pings(during) == [], during
            assert any("acquisition_stuck" in f.get("STATUS", "") for _, f in
                       listener.messages), listener.messages[-5:]
            st = svc.command("status")
            assert st["watchdog"]["stale_loops"] == ["stuck"]
            assert "acquisition_stuck" in [f["kind"] for f in st["faults"]]
            hang.unlink()         # the loop runs again: the pings come back
            after = listener.collect(2.5)
            assert len(_pings(after)) >= 2
            svc.proc.send_signal(signal.SIGHUP)
            reload_msgs = []
            end = time.monotonic() + 10
            while time.monotonic() < end and not any("READY" in f for _, f in reload_msgs):
                reload_msgs += listener.collect(0.2)
            keys = [k for _, f in reload_msgs for k in f]
            assert keys.index("RELOADING") < keys.index("READY")
            rc = svc.terminate()
            stop = listener.collect(0.5)
            assert rc == 0, svc.log()
            assert any(f.get("STOPPING") == "1" for _, f in stop)
    finally:
        listener.close()


UNIT = Path(__file__).resolve().parents[1] / "tools" / "straind.service"


def _unit_sections(text: str) -> dict[str, list[tuple[str, str]]]:
    """Sections of a unit file as (key, value) lists (keys may repeat)."""
    out: dict[str, list[tuple[str, str]]] = {}
    section = None
    for raw in text.splitlines():
        line = raw.strip()
        if not line or line.startswith(("#", ";")):
            continue
        if line.startswith("[") and line.endswith("]"):
            section = line[1:-1]
            out.setdefault(section, [])
            continue
        assert section is not None and "=" in line, raw
        key, value = line.split("=", 1)
        out[section].append((key.strip(), value.strip()))
    return out


def _seconds(value: str) -> float:
    units = {"ms": 1e-3, "s": 1.0, "min": 60.0}
    for suffix, factor in units.items():
        if value.endswith(suffix) and value[: -len(suffix)].replace(".", "").isdigit():
            return float(value[: -len(suffix)]) * factor
    return float(value)


def test_systemd_unit_file(tmp_path: Path) -> None:
    from straind.service import STOP_TIMEOUT_S
    sections = _unit_sections(UNIT.read_text())
    svc = dict(sections["Service"])
    assert svc["Type"] == "notify" and svc["NotifyAccess"] == "main"
    assert 10 <= _seconds(svc["WatchdogSec"]) <= 120
    assert svc["Restart"] in ("on-failure", "always") and _seconds(svc["RestartSec"]) > 0
    assert svc["ExecStart"] == "/opt/straind/bin/straind run -c /etc/straind/straind.yaml"
    assert svc["ExecReload"] == "/bin/kill -HUP $MAINPID"
    assert svc["User"] == "straind" and "dialout" in svc["SupplementaryGroups"].split()
    assert svc["StateDirectory"] == "straind" and svc["RuntimeDirectory"] == "straind"
    assert "/var/lib/straind" in svc["ReadWritePaths"].split()
    for key in ("ProtectHome", "PrivateTmp", "NoNewPrivileges"):
        assert svc[key] == "yes", key
    assert svc["ProtectSystem"] == "strict"
    # systemd must give the service's own bounded stop time to finish before it kills it
    assert _seconds(svc["TimeoutStopSec"]) > STOP_TIMEOUT_S
    # the clock synchronisation check reads adjtimex(), which ProtectClock= would filter
    assert "ProtectClock" not in svc
    assert dict(sections["Install"])["WantedBy"] == "multi-user.target"
    assert dict(sections["Unit"])["StartLimitIntervalSec"] == "0"
    analyze = shutil.which("systemd-analyze")
    if analyze:   # the real parser too, with ExecStart pointing at the installed entry point
        exe = Path(sys.executable).with_name("straind")
        unit = tmp_path / "straind.service"
        unit.write_text(UNIT.read_text().replace("/opt/straind/bin/straind", str(exe)))
        r = subprocess.run([analyze, "verify", str(unit)], capture_output=True, text=True,
                           timeout=60)
        assert r.returncode == 0 and not r.stderr.strip(), r.stderr
