"""Fixtures for tests that talk MQTT: a real mosquitto broker (own process, free 127.0.0.1 port, temporary
config), the service as a subprocess, and an independent event collector (mosquitto_sub).

Never the machine's broker on 1883. The broker keeps its persistence in a temporary directory it can
write (it runs as the test's user, or as root with ``user root``, so it does not drop to an account
that cannot write there: then sessions would not survive a restart) and saves it every second (a
``kill -9`` loses what changed since; saving on every change rewrites the whole store per message).
It raises ``max_queued_messages``: mosquitto's default of 1000 silently drops QoS 1 messages queued
for a slow subscriber.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import time
import urllib.error
import urllib.request
from collections.abc import Callable
from pathlib import Path
from typing import Any

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def available() -> bool:
    """mosquitto and its clients (Debian packages mosquitto and mosquitto-clients)."""
    tools = (MOSQUITTO, shutil.which("mosquitto_sub") or "/usr/bin/mosquitto_sub",
             shutil.which("mosquitto_pub") or "/usr/bin/mosquitto_pub")  # fmt: skip
    return all(os.path.exists(tool) and os.access(tool, os.X_OK) for tool in tools)


class Broker:
    def __init__(self, directory: Path, max_queued_messages: int = 1_000_000, port: int | None = None,
                 persistence: bool = True) -> None:  # fmt: skip
        self.directory = directory
        self.directory.mkdir(parents=True, exist_ok=True)
        self.port = port or free_port()
        self.max_queued_messages = max_queued_messages
        self.config_path = directory / "mosquitto.conf"
        self.log_path = directory / "mosquitto.log"
        self.process: subprocess.Popen[bytes] | None = None
        lines = [
            f"listener {self.port} 127.0.0.1",
            "allow_anonymous true",
            f"persistence {'true' if persistence else 'false'}",
            f"persistence_location {directory}/",
            "autosave_interval 1",
            f"max_queued_messages {max_queued_messages}",
            "max_inflight_messages 100",
            "set_tcp_nodelay true",
            f"log_dest file {self.log_path}",
            "log_type error",
            "log_type warning",
            "log_type notice",
        ]
        if os.geteuid() == 0:
            lines.append("user root")
        self.config_path.write_text("\n".join(lines) + "\n")

    def start(self, timeout: float = 10.0) -> Broker:
        self.process = subprocess.Popen([MOSQUITTO, "-c", str(self.config_path)], stdout=subprocess.DEVNULL,
                                        stderr=subprocess.DEVNULL)  # fmt: skip
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"mosquitto exited with {self.process.returncode}: {self.log()}")
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    return self
            except OSError:
                time.sleep(0.02)
        raise RuntimeError(f"mosquitto did not listen on {self.port}: {self.log()}")

    def kill(self) -> None:
        """kill -9: no goodbye to clients, no final save."""
        if self.process is not None and self.process.poll() is None:
            os.kill(self.process.pid, signal.SIGKILL)
            self.process.wait(5)

    def stop(self) -> None:
        if self.process is not None and self.process.poll() is None:
            os.kill(self.process.pid, signal.SIGTERM)
            try:
                self.process.wait(5)
            except subprocess.TimeoutExpired:
                self.kill()

    def restart(self) -> Broker:
        self.kill()
        return self.start()

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""


# ---------------------------------------------------------------------------------------------------
# The service as a subprocess, and an independent collector (mosquitto_sub, a client we did not write)

ROOT = Path(__file__).resolve().parent.parent
STREAMGUARD = str(ROOT / ".venv" / "bin" / "streamguard")
MOSQUITTO_SUB = shutil.which("mosquitto_sub") or "/usr/bin/mosquitto_sub"
MOSQUITTO_PUB = shutil.which("mosquitto_pub") or "/usr/bin/mosquitto_pub"


def wait_until(condition: Callable[[], object], timeout: float, what: str, interval: float = 0.05) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if condition():
            return
        time.sleep(interval)
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")


def http_get(port: int, path: str) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}{path}", timeout=5) as response:
            return response.status, response.read().decode()
    except urllib.error.HTTPError as error:
        return error.code, error.read().decode()


def scrape(port: int) -> dict[str, float]:
    """Prometheus text format to {series: value}, e.g. 'streamguard_decode_failures_total{reason="not_json"}'."""
    _status, text = http_get(port, "/metrics")
    values: dict[str, float] = {}
    for line in text.splitlines():
        if line and not line.startswith("#"):
            series, _, value = line.rpartition(" ")
            values[series] = float(value)
    return values


class ServiceProcess:
    """``streamguard run`` in its own process, with its JSON-lines log in a file."""

    def __init__(self, config: Path, limits: Path | None, log_path: Path, metrics_port: int) -> None:
        self.config = config
        self.limits = limits
        self.log_path = log_path
        self.metrics_port = metrics_port
        self.process: subprocess.Popen[bytes] | None = None

    def start(self, ready_timeout: float = 60.0) -> ServiceProcess:
        command = [STREAMGUARD, "run", "--config", str(self.config)]
        if self.limits is not None:
            command += ["--limits", str(self.limits)]
        log = self.log_path.open("ab")
        self.process = subprocess.Popen(command, stdout=log, stderr=subprocess.STDOUT, cwd=self.config.parent)
        log.close()
        wait_until(self.ready, ready_timeout, "the service to be ready")
        return self

    def ready(self) -> bool:
        assert self.process is not None
        if self.process.poll() is not None:
            raise AssertionError(f"service exited with {self.process.returncode}:\n{self.log_text()[-3000:]}")
        try:
            return http_get(self.metrics_port, "/readyz")[0] == 200
        except OSError:
            return False

    def metrics(self) -> dict[str, float]:
        return scrape(self.metrics_port)

    def signal(self, signum: int) -> None:
        assert self.process is not None
        os.kill(self.process.pid, signum)

    def kill(self) -> None:
        if self.process is not None and self.process.poll() is None:
            os.kill(self.process.pid, signal.SIGKILL)
            self.process.wait(10)

    def wait(self, timeout: float) -> int:
        assert self.process is not None
        return self.process.wait(timeout)

    def log_text(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def log_records(self) -> list[dict[str, Any]]:
        records = []
        for line in self.log_text().splitlines():
            try:
                records.append(json.loads(line))
            except ValueError:
                continue
        return records


class Collector:
    """mosquitto_sub with a persistent session (-c -i), line-buffered into a file; it reconnects by itself
    after a broker restart and resumes its session."""

    PROBE = '{"probe": true}'

    def __init__(self, broker: Broker, topic_filter: str, client_id: str, path: Path) -> None:
        self.broker = broker
        self.filter = topic_filter
        self.client_id = client_id
        self.path = path
        handle = path.open("wb")
        self.process = subprocess.Popen(
            ["stdbuf", "-oL", MOSQUITTO_SUB, "-h", "127.0.0.1", "-p", str(broker.port), "-t", topic_filter, "-q", "1",
             "-c", "-i", client_id, "-F", "%t\t%p"],
            stdout=handle, stderr=subprocess.DEVNULL,
        )  # fmt: skip
        handle.close()

    def wait_subscribed(self, probe_topic: str, timeout: float = 10.0) -> None:
        """Publish probes until one comes back: then the subscription is in place."""

        def probed() -> bool:
            subprocess.run([MOSQUITTO_PUB, "-h", "127.0.0.1", "-p", str(self.broker.port), "-t", probe_topic, "-q", "1",
                            "-m", self.PROBE], check=False, timeout=5)  # fmt: skip
            time.sleep(0.1)
            return self.PROBE in self.path.read_text(errors="replace")

        wait_until(probed, timeout, f"collector {self.client_id} to subscribe", interval=0.2)

    def messages(self) -> list[tuple[str, str]]:
        out = []
        for line in self.path.read_text(errors="replace").splitlines():
            topic, _, payload = line.partition("\t")
            if payload and payload != self.PROBE:
                out.append((topic, payload))
        return out

    def events(self) -> list[dict[str, Any]]:
        return [json.loads(p) for _t, p in self.messages()]

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(5)
            except subprocess.TimeoutExpired:
                self.process.kill()
