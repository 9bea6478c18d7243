"""The local control socket: how ``straind tare``, ``straind status`` and friends reach a running
service.

A Unix stream socket with mode 0600 (only the service's user may command it). One request per
line, JSON: ``{"command": "tare", "args": {"channels": ["frame1/g1"]}}``; one reply line:
``{"ok": true, "result": ...}`` or ``{"ok": false, "error": "..."}``. The same dispatcher serves
remote commands from the MQTT feed, so every command is handled (and recorded) the same way.
"""

from __future__ import annotations

import json
import os
import socket
import threading
from pathlib import Path
from typing import Any, Callable

__all__ = ["CommandError", "ControlServer", "send_command", "ControlUnavailable"]

MAX_REQUEST_BYTES = 64 * 1024


class CommandError(ValueError):
    """A command that cannot be carried out; the message is sent back to the caller."""


class ControlUnavailable(OSError):
    """No service answers on the control socket."""


Handler = Callable[[str, dict, str], Any]


class ControlServer:
    """Serves the control socket on its own thread; `handler(name, args, origin)` does the work."""

    def __init__(self, path: Path, handler: Handler, log: Any = None):
        self.path = Path(path)
        self.handler = handler
        self.log = log
        self._sock: socket.socket | None = None
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()

    def start(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        if self.path.exists() or self.path.is_symlink():
            # a socket left by a killed service; refuse if a live one answers
            try:
                send_command(self.path, "ping", timeout_s=1.0)
            except ControlUnavailable:
                self.path.unlink()
            else:
                raise RuntimeError(f"another straind is already serving {self.path}")
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        old = os.umask(0o177)
        try:
            sock.bind(str(self.path))
        finally:
            os.umask(old)
        os.chmod(self.path, 0o600)
        sock.listen(8)
        sock.settimeout(0.2)
        self._sock = sock
        self._thread = threading.Thread(target=self._serve, name="straind-control", daemon=True)
        self._thread.start()

    def _serve(self) -> None:
        assert self._sock is not None
        while not self._stop.is_set():
            try:
                conn, _ = self._sock.accept()
            except socket.timeout:
                continue
            except OSError:
                break
            threading.Thread(target=self._client, args=(conn,), daemon=True,
                             name="straind-control-client").start()

    def _client(self, conn: socket.socket) -> None:
        with conn:
            conn.settimeout(30.0)
            buf = b""
            try:
                while b"\n" not in buf and len(buf) < MAX_REQUEST_BYTES:
                    chunk = conn.recv(4096)
                    if not chunk:
                        break
                    buf += chunk
            except OSError:
                return
            reply = self._dispatch(buf.split(b"\n", 1)[0])
            try:
                conn.sendall(json.dumps(reply, default=str).encode() + b"\n")
            except OSError:
                pass

    def _dispatch(self, line: bytes) -> dict:
        try:
            req = json.loads(line.decode("utf-8"))
        except (UnicodeDecodeError, ValueError) as exc:
            return {"ok": False, "error": f"request is not JSON: {exc}"}
        if not isinstance(req, dict) or not isinstance(req.get("command"), str):
            return {"ok": False, "error": "request needs a 'command' string"}
        args = req.get("args") or {}
        if not isinstance(args, dict):
            return {"ok": False, "error": "'args' must be a mapping"}
        if req["command"] == "ping":
            return {"ok": True, "result": "pong"}
        try:
            return {"ok": True, "result": self.handler(req["command"], args, "control-socket")}
        except CommandError as exc:
            return {"ok": False, "error": str(exc)}
        except Exception as exc:  # a bug must not kill the control thread
            if self.log:
                self.log.exception("control command %s failed", req["command"])
            return {"ok": False, "error": f"internal error: {type(exc).__name__}: {exc}"}

    def stop(self) -> None:
        self._stop.set()
        if self._sock is not None:
            try:
                self._sock.close()
            except OSError:
                pass
            self._sock = None
        if self._thread is not None:
            self._thread.join(timeout=2)
        try:
            self.path.unlink()
        except FileNotFoundError:
            pass


def send_command(path: Path | str, command: str, args: dict | None = None,
                 timeout_s: float = 30.0) -> Any:
    """Send one command to a running service and return its result; raise CommandError on a
    refused command and ControlUnavailable when nothing answers."""
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    sock.settimeout(timeout_s)
    try:
        try:
            sock.connect(str(path))
        except (FileNotFoundError, ConnectionRefusedError) as exc:
            raise ControlUnavailable(f"no straind is running at {path} ({exc.strerror})") from None
        sock.sendall(json.dumps({"command": command, "args": args or {}}).encode() + b"\n")
        buf = b""
        while not buf.endswith(b"\n"):
            chunk = sock.recv(65536)
            if not chunk:
                break
            buf += chunk
    finally:
        sock.close()
    if not buf:
        raise ControlUnavailable(f"straind at {path} closed the connection without a reply")
    reply = json.loads(buf)
    if not reply.get("ok"):
        raise CommandError(reply.get("error", "command failed"))
    return reply.get("result")
