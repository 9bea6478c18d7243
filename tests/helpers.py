"""Test helpers: configurations on disk and real straind processes."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import yaml

from straind.control import ControlUnavailable, send_command


def write_config(tmp_path: Path, devices: list[dict], name: str = "straind.yaml",
                 storage: dict | None = None, **top: Any) -> Path:
    """Write a configuration with storage under tmp_path/data and return its path."""
    doc: dict[str, Any] = {
        "station": {"id": "test-station"},
        "storage": {"path": str(tmp_path / "data"), "flush_interval_s": 0.2, **(storage or {})},
        "control": {"socket": str(tmp_path / "straind.sock")},
        "devices": devices,
    }
    doc.update(top)
    p = tmp_path / name
    p.write_text(yaml.safe_dump(doc, sort_keys=False))
    return p


def sim_device(channels: list[dict], rate_hz: float = 200, name: str = "dev0", gain: int = 128,
               block_samples: int = 0, **options: Any) -> dict:
    return {"name": name, "driver": "simulated-bridge", "sample_rate_hz": rate_hz,
            "block_samples": block_samples, "adc": {"gain": gain},
            "options": {"seed": 1, **options}, "channels": channels}


class ServiceProcess:
    """A real `straind run` child process, with its control socket."""

    def __init__(self, config: Path, socket: Path, *extra: str, env: dict | None = None):
        self.config = config
        self.socket = socket
        self.log_path = config.parent / f"straind-{time.monotonic_ns()}.log"
        self._log = open(self.log_path, "wb")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "straind.cli", "run", "-c", str(config), *extra],
            stdout=self._log, stderr=subprocess.STDOUT, env={**os.environ, **(env or {})})

    def wait_ready(self, timeout_s: float = 30.0, samples: int = 1) -> dict:
        """Wait until the service answers and every device has delivered `samples` samples."""
        deadline = time.monotonic() + timeout_s
        last = None
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise AssertionError(f"straind exited {self.proc.returncode}:\n{self.log()}")
            try:
                st = send_command(self.socket, "status", timeout_s=2)
                last = st
                if all(d["samples"] >= samples for d in st["devices"].values()):
                    return st
            except (ControlUnavailable, OSError, ValueError):
                pass
            time.sleep(0.05)
        raise AssertionError(f"straind not ready in {timeout_s} s (last status {last}):\n{self.log()}")

    def command(self, name: str, args: dict | None = None, timeout_s: float = 30) -> Any:
        return send_command(self.socket, name, args or {}, timeout_s=timeout_s)

    def kill(self) -> None:
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(timeout=10)
        self._log.close()

    def terminate(self, timeout_s: float = 20) -> int:
        self.proc.send_signal(signal.SIGTERM)
        rc = self.proc.wait(timeout=timeout_s)
        self._log.close()
        return rc

    def log(self) -> str:
        self._log.flush()
        return self.log_path.read_text(errors="replace")

    def __enter__(self) -> "ServiceProcess":
        return self

    def __exit__(self, *exc: object) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(timeout=10)
        if not self._log.closed:
            self._log.close()
