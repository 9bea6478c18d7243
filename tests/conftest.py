"""Shared fixtures: a private Mosquitto broker per test, and a collecting MQTT subscriber.

The broker listens on a free loopback port, can be stopped and started again on the same port
(with its persistence file, so sessions and queued messages survive like on a real plant
broker), and raises the per-client queue limits so a slow test subscriber loses nothing.
"""

from __future__ import annotations

import getpass
import os
import shutil
import socket
import subprocess
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Callable

import pytest

INSTALL_HINT = ("mosquitto is not installed; the MQTT feed tests need a real broker: "
                "apt-get install mosquitto (it provides mosquitto and mosquitto_passwd)")


def free_port() -> int:
    """A TCP port that was free on 127.0.0.1 a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def mosquitto_binary() -> str:
    """Path of the broker binary; fails the test (never skips) when it is missing."""
    for candidate in (shutil.which("mosquitto"), "/usr/sbin/mosquitto", "/usr/local/sbin/mosquitto"):
        if candidate and os.path.exists(candidate):
            return candidate
    pytest.fail(INSTALL_HINT, pytrace=False)


class Broker:
    """One Mosquitto process with its own directory, port and configuration.

    tls:           dict(ca_file=..., cert_file=..., key_file=..., require_certificate=False)
    password_file: a mosquitto_passwd file; anonymous clients are then refused.
    """

    host = "127.0.0.1"

    def __init__(self, workdir: str, port: int | None = None, tls: dict | None = None,
                 password_file: str | None = None, extra: str = ""):
        self.binary = mosquitto_binary()
        self.workdir = str(workdir)
        os.makedirs(self.workdir, exist_ok=True)
        self.port = port or free_port()
        self.tls = tls
        self.password_file = password_file
        self.extra = extra
        self.proc: subprocess.Popen | None = None
        self.conf_path = os.path.join(self.workdir, "mosquitto.conf")
        self.log_path = os.path.join(self.workdir, "mosquitto.log")
        self._write_conf()

    def _write_conf(self) -> None:
        lines = [
            f"listener {self.port} {self.host}",
            f"allow_anonymous {'false' if self.password_file else 'true'}",
            "persistence true",
            f"persistence_location {self.workdir}/",
            "autosave_interval 1",
            # lossless subscribers: the default per-client queue (1000 messages) is far too
            # small for a subscriber that is briefly slow or offline
            "max_queued_messages 1000000",
            "max_queued_bytes 0",
            "max_inflight_messages 100",
            "set_tcp_nodelay true",
            f"log_dest file {self.log_path}",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_type information",
        ]
        if os.geteuid() == 0:
            lines.append("user root")        # keep access to the test's files
        elif getpass.getuser():
            lines.append(f"user {getpass.getuser()}")
        if self.password_file:
            lines.append(f"password_file {self.password_file}")
        if self.tls:
            lines += [f"cafile {self.tls['ca_file']}", f"certfile {self.tls['cert_file']}",
                      f"keyfile {self.tls['key_file']}",
                      f"require_certificate {'true' if self.tls.get('require_certificate') else 'false'}"]
        if self.extra:
            lines.append(self.extra)
        with open(self.conf_path, "w") as fh:
            fh.write("\n".join(lines) + "\n")

    def start(self, timeout_s: float = 10.0) -> "Broker":
        """Start (again) on the same port and wait until it accepts connections."""
        if self.running:
            return self
        self.proc = subprocess.Popen([self.binary, "-c", self.conf_path],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                err = self.proc.stderr.read().decode(errors="replace") if self.proc.stderr else ""
                pytest.fail(f"mosquitto exited at start (rc {self.proc.returncode}): {err}\n"
                            f"{self.read_log()}", pytrace=False)
            try:
                with socket.create_connection((self.host, self.port), timeout=0.5):
                    return self
            except OSError:
                time.sleep(0.05)
        self.stop()
        pytest.fail(f"mosquitto did not listen on port {self.port} within {timeout_s} s",
                    pytrace=False)

    @property
    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def stop(self, timeout_s: float = 5.0) -> None:
        """Stop cleanly (SIGTERM: the broker saves its sessions and queued messages)."""
        if self.proc is None:
            return
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout_s)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout_s)
        if self.proc.stderr:
            self.proc.stderr.close()
        self.proc = None

    def restart(self) -> "Broker":
        self.stop()
        return self.start()

    def read_log(self) -> str:
        try:
            with open(self.log_path, errors="replace") as fh:
                return fh.read()
        except OSError:
            return ""


@pytest.fixture
def broker_factory(tmp_path):
    """Make brokers (plain, TLS, with passwords); all are stopped at the end of the test."""
    made: list[Broker] = []

    def make(name: str = "broker", start: bool = True, **kwargs: Any) -> Broker:
        b = Broker(str(tmp_path / name), **kwargs)
        made.append(b)
        return b.start() if start else b

    yield make
    for b in made:
        b.stop()


@pytest.fixture
def mosquitto_broker(broker_factory) -> Broker:
    """A running plain broker on a free loopback port."""
    return broker_factory()


# ------------------------------------------------------------------------------- subscriber


@dataclass
class Received:
    topic: str
    payload: bytes
    retain: bool
    qos: int
    properties: Any
    arrival_ns: int


@dataclass
class Collector:
    """A paho subscriber that records every message; persistent session, QoS 1."""

    host: str
    port: int
    topics: list[str]
    client_id: str = ""
    protocol: str = "5"
    tls_ca: str | None = None
    username: str | None = None
    password: str | None = None
    messages: list[Received] = field(default_factory=list)

    def __post_init__(self) -> None:
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion
        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties

        self._cond = threading.Condition()
        self.connected = threading.Event()
        v5 = self.protocol == "5"
        cid = self.client_id or f"collector-{os.getpid()}-{time.monotonic_ns()}"
        kw: dict[str, Any] = {"callback_api_version": CallbackAPIVersion.VERSION2,
                              "client_id": cid,
                              "protocol": mqtt.MQTTv5 if v5 else mqtt.MQTTv311}
        if not v5:
            kw["clean_session"] = False
        self.client = mqtt.Client(**kw)
        self.client.reconnect_delay_set(0.1, 0.5)
        if self.tls_ca:
            self.client.tls_set(ca_certs=self.tls_ca)
        if self.username:
            self.client.username_pw_set(self.username, self.password)
        self.client.on_connect = self._on_connect
        self.client.on_message = self._on_message
        self.client.on_disconnect = lambda *a: self.connected.clear()
        if v5:
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = 3600
            self.client.connect_async(self.host, self.port, 30, clean_start=False,
                                      properties=props)
        else:
            self.client.connect_async(self.host, self.port, 30)
        self.client.loop_start()

    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        if reason_code.is_failure:
            return
        for t in self.topics:
            client.subscribe(t, qos=1)
        self.connected.set()

    def _on_message(self, client, userdata, msg) -> None:
        with self._cond:
            self.messages.append(Received(msg.topic, bytes(msg.payload), bool(msg.retain),
                                          msg.qos, getattr(msg, "properties", None),
                                          time.time_ns()))
            self._cond.notify_all()

    def wait_connected(self, timeout_s: float = 10.0) -> None:
        if not self.connected.wait(timeout_s):
            raise AssertionError(f"test subscriber could not connect to {self.host}:{self.port}")
        time.sleep(0.1)   # let the SUBACK arrive

    def wait_for(self, predicate: Callable[[list[Received]], bool], timeout_s: float = 10.0,
                 what: str = "messages") -> list[Received]:
        deadline = time.monotonic() + timeout_s
        with self._cond:
            while not predicate(self.messages):
                left = deadline - time.monotonic()
                if left <= 0:
                    raise AssertionError(f"timed out after {timeout_s} s waiting for {what}; "
                                         f"got {len(self.messages)} message(s)")
                self._cond.wait(min(left, 0.2))
            return list(self.messages)

    def on(self, topic: str) -> list[Received]:
        with self._cond:
            return [m for m in self.messages if m.topic == topic]

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


@pytest.fixture
def collector_factory():
    """Make subscribers; all are closed at the end of the test."""
    made: list[Collector] = []

    def make(host: str, port: int, topics: list[str], **kwargs: Any) -> Collector:
        c = Collector(host, port, topics, **kwargs)
        made.append(c)
        return c

    yield make
    for c in made:
        c.close()
