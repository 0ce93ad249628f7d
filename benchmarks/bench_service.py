"""Live-service benchmark against a real mosquitto on loopback (not a test; prints a table).

What it measures, in one run, each figure the median of several repetitions:

1. Throughput ceiling: a bare paho-mqtt subscriber that only ``json.loads`` each payload, draining a
   queue of QoS 1 messages the broker holds for its persistent session. This is the most any paho client
   in Python can take on this machine; the service is measured draining the same queue the same way.
2. Service throughput (receive -> journal -> decode -> pipeline -> events to the outbox and broker),
   with 10,000 tags, for one sample per message and for 100-sample (gateway) messages; the ratio to 1.
3. p99 latency from receive to decision with messages arriving at half the measured ceiling rate.
4. Resident memory of a ``streamguard run`` process tracking 100,000 tags.

The queue is filled by a minimal raw-socket MQTT 3.1.1 publisher (this file), far faster than paho's,
so the publisher never limits what is measured. Run: ``.venv/bin/python benchmarks/bench_service.py``
(``--quick`` for fewer repetitions). Needs /usr/sbin/mosquitto.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import socket
import statistics
import struct
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path
from typing import Any

import numpy as np
import yaml

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from tests.mqtt_broker import Broker  # noqa: E402

PYTHON = sys.executable
BASE_NS = 1_772_409_600 * 10**9  # 2026-03-02T00:00:00Z
TOPIC = "bench/{tag}"
FILTER = "bench/+"


# ---------------------------------------------------------------------------------------------------
# payloads and a fast publisher


def tag_name(i: int) -> str:
    return f"T{i:06d}"


def iso(ns: int) -> str:
    seconds, rest = divmod(ns, 10**9)
    text = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(seconds))
    return f"{text}.{rest // 1000:06d}Z" if rest else text + "Z"


def make_messages(n_messages: int, n_tags: int, samples_per_message: int, seed: int = 1) -> list[tuple[bytes, bytes]]:
    """Round-robin over tags; each message carries the next samples of its tag, 1 s apart."""
    rng = np.random.default_rng(seed)
    values = rng.normal(0.0, 1.0, n_messages * samples_per_message).round(4).tolist()
    out = []
    k = 0
    for m in range(n_messages):
        t = m % n_tags
        rounds = m // n_tags
        samples = []
        for j in range(samples_per_message):
            ts = BASE_NS + (rounds * samples_per_message + j) * 10**9
            samples.append({"timestamp": iso(ts), "value": values[k], "quality": "good"})
            k += 1
        body = samples[0] if samples_per_message == 1 else samples
        out.append((TOPIC.format(tag=tag_name(t)).encode(), json.dumps(body, separators=(",", ":")).encode()))
    return out


def _remaining_length(n: int) -> bytes:
    out = bytearray()
    while True:
        byte, n = n % 128, n // 128
        out.append(byte | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _utf8(text: bytes) -> bytes:
    return struct.pack("!H", len(text)) + text


class RawPublisher:
    """MQTT 3.1.1 QoS 1 publishing over a plain socket: pipelined, PUBACKs counted by a reader thread."""

    def __init__(self, port: int, client_id: str = "bench-raw-publisher") -> None:
        self.sock = socket.create_connection(("127.0.0.1", port))
        self.sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        variable = _utf8(b"MQTT") + bytes([4, 0x02]) + struct.pack("!H", 60)
        body = variable + _utf8(client_id.encode())
        self.sock.sendall(bytes([0x10]) + _remaining_length(len(body)) + body)
        connack = self.sock.recv(4)
        if len(connack) != 4 or connack[3] != 0:
            raise RuntimeError(f"CONNACK refused: {connack!r}")
        self.acked = 0
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        buffer = b""
        while True:
            try:
                chunk = self.sock.recv(1 << 16)
            except OSError:
                return
            if not chunk:
                return
            buffer += chunk
            whole = len(buffer) // 4 * 4  # PUBACKs are 4 bytes; nothing else is sent to us
            self.acked += whole // 4
            buffer = buffer[whole:]

    def publish_all(self, messages: list[tuple[bytes, bytes]], rate: float | None = None,
                    sent_at: list[float] | None = None) -> float:  # fmt: skip
        """Send every message (at ``rate`` per second if given); returns seconds until all were acked."""
        start = time.perf_counter()
        base = self.acked
        pending: list[bytes] = []
        for i, (topic, payload) in enumerate(messages):
            packet_id = i % 65535 + 1
            while i - (self.acked - base) > 30_000:
                time.sleep(0.0005)
            variable = _utf8(topic) + struct.pack("!H", packet_id)
            pending.append(bytes([0x32]) + _remaining_length(len(variable) + len(payload)) + variable + payload)
            if rate is not None:
                due = start + i / rate
                wait = due - time.perf_counter()
                if wait > 0:
                    if pending:
                        self.sock.sendall(b"".join(pending))
                        pending = []
                    time.sleep(wait)
            elif len(pending) >= 256:
                self.sock.sendall(b"".join(pending))
                pending = []
        if pending:
            self.sock.sendall(b"".join(pending))
        while self.acked - base < len(messages):
            time.sleep(0.001)
        return time.perf_counter() - start

    def close(self) -> None:
        try:
            self.sock.sendall(bytes([0xE0, 0]))
        finally:
            self.sock.close()


# ---------------------------------------------------------------------------------------------------
# roles, each in its own process (its own GIL)


def role_session(port: int, client_id: str, protocol: str) -> None:
    """Create a persistent session subscribed to the benchmark topics, then leave."""
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    done = threading.Event()
    if protocol == "5":
        client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=paho.MQTTv5)
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = 3600
        client.on_subscribe = lambda *a: done.set()
        client.connect("127.0.0.1", port, 60, clean_start=False, properties=props)
    else:
        client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=paho.MQTTv311,
                             clean_session=False)  # fmt: skip
        client.on_subscribe = lambda *a: done.set()
        client.connect("127.0.0.1", port, 60)
    client.on_connect = lambda c, *a: c.subscribe(FILTER, qos=1)
    client.loop_start()
    done.wait(10)
    client.disconnect()
    client.loop_stop()


def role_bare(port: int, client_id: str, protocol: str, expected: int, warm: int) -> None:
    """The ceiling: paho with callback API 2, QoS 1, json.loads per message and nothing else.

    Timed from the end of the first ``warm`` messages (one per tag, as for the service) to the last."""
    import paho.mqtt.client as paho
    from paho.mqtt.enums import CallbackAPIVersion
    from paho.mqtt.packettypes import PacketTypes
    from paho.mqtt.properties import Properties

    state = {"n": 0, "first": 0.0, "last": 0.0}
    done = threading.Event()

    def on_message(client: Any, userdata: Any, message: Any) -> None:
        json.loads(message.payload)
        state["n"] += 1
        if state["n"] == warm:
            state["first"] = time.perf_counter()
            state["cpu_first"] = time.process_time()
        if state["n"] == expected:
            state["last"] = time.perf_counter()
            state["cpu_last"] = time.process_time()
            done.set()

    if protocol == "5":
        client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=paho.MQTTv5)
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = 3600
        client.connect("127.0.0.1", port, 60, clean_start=False, properties=props)
    else:
        client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=paho.MQTTv311,
                             clean_session=False)  # fmt: skip
        client.connect("127.0.0.1", port, 60)
    client.on_message = on_message
    client.loop_start()
    done.wait(600)
    client.disconnect()
    client.loop_stop()
    print(json.dumps({"messages": state["n"], "seconds": state["last"] - state["first"],
                      "cpu_seconds": state["cpu_last"] - state["cpu_first"]}))


def role_service(config_path: str, limits_path: str | None, expected_samples: int, latencies: bool,
                 warm_samples: int) -> None:  # fmt: skip
    """The service in this process (no CLI), timed from the decision on the first ``warm_samples`` (one
    message per tag: the tag table filled, kernels loaded) to the decision on the last sample."""
    from streamguard.service import Service, setup_logging

    setup_logging(open(os.devnull, "w"))  # noqa: SIM115 - kept open for the process's life
    service = Service(config_path, limits_path, install_signals=False, record_latencies=latencies)
    state = {"first": 0.0, "last": 0.0}

    def watch() -> None:
        # Polls a plain counter every 5 ms: a busier watcher would take the interpreter lock from the
        # network thread often enough to slow down what it measures.
        while True:
            time.sleep(0.005)
            processed = service.samples_decided
            if processed >= warm_samples and not state["first"]:
                state["first"] = time.perf_counter()
                state["cpu_first"] = time.process_time()
                if latencies and service.latencies is not None:
                    service.latencies.clear()
            if processed >= expected_samples:
                state["last"] = time.perf_counter()
                state["cpu_last"] = time.process_time()
                service.stop()
                return

    threading.Thread(target=watch, daemon=True).start()
    service.run()
    result: dict[str, Any] = {"seconds": state["last"] - state["first"], "events": sum(service.events.values()),
                              "cpu_seconds": state["cpu_last"] - state["cpu_first"]}
    if latencies and service.latencies:
        values = np.concatenate(service.latencies)
        result["latency_p50_ms"] = float(np.percentile(values, 50) * 1e3)
        result["latency_p99_ms"] = float(np.percentile(values, 99) * 1e3)
        result["latency_max_ms"] = float(values.max() * 1e3)
        result["latency_count"] = int(values.size)
    print(json.dumps(result))


# ---------------------------------------------------------------------------------------------------
# orchestration


def _role(*args: str, wait: bool = True) -> Any:
    command = [PYTHON, __file__, "--role", *args]
    if not wait:
        return subprocess.Popen(command, stdout=subprocess.PIPE, text=True)
    out = subprocess.run(command, capture_output=True, text=True, check=True, timeout=900)
    return json.loads(out.stdout.strip().splitlines()[-1]) if out.stdout.strip() else None


def _finish(process: subprocess.Popen[str]) -> Any:
    out, _ = process.communicate(timeout=900)
    return json.loads(out.strip().splitlines()[-1])


def write_config(directory: Path, port: int, client_id: str, protocol: str, metrics_port: int | None,
                 checkpoint_interval: str = "60s") -> Path:  # fmt: skip
    config: dict[str, Any] = {
        "subgroup": {"size": 1},
        # Sized like the demo for a quiet in-control stream (a few false alarms per million points).
        "detectors": {"shewhart": {"limit": 4.4, "rules": ["we1"]}, "cusum": {"k": 0.5, "h": 10.0},
                      "ewma": {"lambda": 0.1, "L": 4.3}},
        "tags": {"T*": {"baseline": {"mean": 0.0, "sigma": 1.0}}},
        "source": {
            "mqtt": {"host": "127.0.0.1", "port": port, "client_id": client_id, "protocol": protocol,
                     "topics": [{"template": TOPIC}], "reconnect": {"initial": "100ms", "max": "1s"}},
            "payload": {"max_future": None, "retained_max_age": None},
            "max_tags": 200_000,
        },
        "metrics": {"listen": f"127.0.0.1:{metrics_port}" if metrics_port else None},
        "checkpoint": {"directory": str(directory / f"state-{client_id}"), "interval": checkpoint_interval},
    }  # fmt: skip
    if os.environ.get("BENCH_BATCH_WINDOW"):
        config["source"]["batch_window"] = os.environ["BENCH_BATCH_WINDOW"]
    path = directory / f"{client_id}.yaml"
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path


def drain(broker: Broker, directory: Path, kind: str, warm: list[tuple[bytes, bytes]],
          messages: list[tuple[bytes, bytes]], per: int, protocol: str, run: int) -> float:  # fmt: skip
    """Fill the broker's queue for a fresh persistent session (a warm-up message per tag, then the measured
    ones), then time ``kind`` draining the measured part."""
    client_id = f"bench-{kind}-{run}-{per}"
    _role("session", str(broker.port), client_id, protocol)
    publisher = RawPublisher(broker.port, f"fill-{client_id}")
    publisher.publish_all(warm + messages)
    publisher.close()
    total = len(warm) + len(messages)
    if kind == "bare":
        result = _role("bare", str(broker.port), client_id, protocol, str(total), str(len(warm)))
    else:
        config = write_config(directory, broker.port, client_id, protocol, None)
        result = _role("service", str(config), "-", str(total * per), "0", str(len(warm) * per))
    forget_session(broker.port, client_id)
    return float(result["seconds"])


def forget_session(port: int, client_id: str) -> None:
    """Connect once with a clean session under the client id: the broker drops the old session, which would
    otherwise keep collecting every later run's messages."""
    RawPublisher(port, client_id).close()


def latency_run(broker: Broker, directory: Path, warm: list[tuple[bytes, bytes]], messages: list[tuple[bytes, bytes]],
                rate: float, per: int, protocol: str, run: int) -> dict[str, Any]:  # fmt: skip
    """Steady state: a message per tag first (the tag table filled), then the paced stream, measured."""
    client_id = f"bench-latency-{run}"
    config = write_config(directory, broker.port, client_id, protocol, None)
    total = (len(warm) + len(messages)) * per
    service = _role("service", str(config), "-", str(total), "1", str(len(warm) * per), wait=False)
    time.sleep(4.0)  # imports, compiled-kernel cache load, connect, subscribe
    publisher = RawPublisher(broker.port, f"pace-{client_id}")
    publisher.publish_all(warm)
    time.sleep(3.0)  # let the service add the tags before the paced stream starts
    publisher.publish_all(messages, rate=rate)
    publisher.close()
    result = dict(_finish(service))
    forget_session(broker.port, client_id)
    return result


def rss_run(broker: Broker, directory: Path, n_tags: int, protocol: str) -> dict[str, Any]:
    """``streamguard run`` (the real command) fed one sample for each of n_tags tags, then a second round
    (every tag charted again), then left to write a checkpoint: RSS after each, and the peak."""
    metrics_port = _free_port()
    interval = 8.0
    config = write_config(directory, broker.port, "bench-rss", protocol, metrics_port, f"{interval:g}s")
    command = [str(ROOT / ".venv" / "bin" / "streamguard"), "run", "--config", str(config)]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        _wait_ready(metrics_port, 60)
        rss_start = _rss_mib(process.pid)
        messages = make_messages(2 * n_tags, n_tags, 1, seed=7)
        publisher = RawPublisher(broker.port, "fill-rss")
        publisher.publish_all(messages[:n_tags])
        tracked = _wait_metric(metrics_port, "streamguard_tags_tracked", n_tags)
        time.sleep(0.5)
        rss_filled, peak_filled = _rss_mib(process.pid), _peak_mib(process.pid)
        publisher.publish_all(messages[n_tags:])
        publisher.close()
        _wait_metric(metrics_port, "streamguard_messages_received_total", 2 * n_tags)
        time.sleep(interval + 2.0)  # at least one checkpoint of the full table
        return {"tags": int(tracked), "rss_mib": rss_filled, "rss_at_start_mib": rss_start,
                "peak_filling_mib": peak_filled, "rss_after_checkpoint_mib": _rss_mib(process.pid),
                "peak_mib": _peak_mib(process.pid)}  # fmt: skip
    finally:
        process.send_signal(signal.SIGTERM)
        process.wait(30)


def _wait_metric(port: int, name: str, at_least: float, timeout: float = 300.0) -> float:
    deadline = time.monotonic() + timeout
    value = 0.0
    while time.monotonic() < deadline:
        value = _metric(port, name)
        if value >= at_least:
            break
        time.sleep(0.2)
    return value


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _wait_ready(port: int, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/readyz", timeout=1) as response:
                if response.status == 200:
                    return
        except OSError:
            pass
        time.sleep(0.1)
    raise RuntimeError("service not ready")


def _metric(port: int, name: str) -> float:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as response:
        for line in response.read().decode().splitlines():
            if line.startswith(name + " "):
                return float(line.split()[1])
    return 0.0


def _rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def _peak_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--role", nargs="+", help=argparse.SUPPRESS)
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--quick", action="store_true", help="one run each, smaller queues")
    parser.add_argument("--protocol", choices=["3.1.1", "5"], default="5")
    parser.add_argument("--tags", type=int, default=10_000)
    parser.add_argument("--single-messages", type=int, default=60_000)
    parser.add_argument("--batch-messages", type=int, default=8_000)
    parser.add_argument("--rss-tags", type=int, default=100_000)
    parser.add_argument("--skip", nargs="*", default=[], choices=["throughput", "latency", "rss"])
    parser.add_argument("--batch-window", default=None, help="source.batch_window for the service (default: its own)")
    args = parser.parse_args()
    if args.batch_window:
        os.environ["BENCH_BATCH_WINDOW"] = args.batch_window
    if args.role:
        role, *rest = args.role
        if role == "session":
            role_session(int(rest[0]), rest[1], rest[2])
        elif role == "bare":
            role_bare(int(rest[0]), rest[1], rest[2], int(rest[3]), int(rest[4]))
        elif role == "service":
            role_service(rest[0], None if rest[1] == "-" else rest[1], int(rest[2]), rest[3] == "1", int(rest[4]))
        return
    runs = 1 if args.quick else args.runs
    if args.quick:
        args.single_messages, args.batch_messages = 20_000, 3_000
    print(f"streamguard service benchmark: mosquitto on loopback, MQTT {args.protocol}, QoS 1, {args.tags:,} tags, "
          f"{os.cpu_count()} CPUs, medians of {runs} run(s)")  # fmt: skip
    with tempfile.TemporaryDirectory(prefix="sg-bench-") as tmp:
        directory = Path(tmp)
        # No broker persistence here: saving every queued message each second would load the broker, and
        # sessions live in memory as long as it runs.
        broker = Broker(directory / "broker", max_queued_messages=10_000_000, persistence=False).start()
        try:
            ceiling_single = None
            ceiling_batch = None
            if "throughput" not in args.skip or "latency" not in args.skip:
                rows = []
                for label, count, per in (("1 sample/message", args.single_messages, 1),
                                          ("100 samples/message", args.batch_messages, 100)):  # fmt: skip
                    both = make_messages(args.tags + count, args.tags, per)
                    warm, messages = both[: args.tags], both[args.tags :]
                    bare_s, service_s = [], []
                    for run in range(runs):
                        bare_s.append(drain(broker, directory, "bare", warm, messages, per, args.protocol, run))
                        service_s.append(drain(broker, directory, "service", warm, messages, per, args.protocol,
                                               run))  # fmt: skip
                    bare_rate = len(messages) / statistics.median(bare_s)
                    service_rate = len(messages) / statistics.median(service_s)
                    rows.append((label, bare_rate, service_rate, per))
                    if per == 1:
                        ceiling_single = bare_rate
                    else:
                        ceiling_batch = bare_rate
                print()
                print(f"{'payload':<22}{'bare paho+json msgs/s':>24}{'service msgs/s':>16}{'samples/s':>12}"
                      f"{'ratio':>8}")  # fmt: skip
                for label, bare_rate, service_rate, per in rows:
                    print(f"{label:<22}{bare_rate:>24,.0f}{service_rate:>16,.0f}{service_rate * per:>12,.0f}"
                          f"{service_rate / bare_rate:>8.2f}")  # fmt: skip
            if "latency" not in args.skip and ceiling_single and ceiling_batch:
                print()
                print("receive -> decision latency, messages paced at half the ceiling rate:")
                for label, per, ceiling in (("1 sample/message", 1, ceiling_single),
                                            ("100 samples/message", 100, ceiling_batch)):  # fmt: skip
                    rate = ceiling / 2
                    n = int(rate * (10 if not args.quick else 5))
                    both = make_messages(args.tags + n, args.tags, per, seed=3)
                    results = [latency_run(broker, directory, both[: args.tags], both[args.tags :], rate, per,
                                           args.protocol, run + 10 * per) for run in range(runs)]  # fmt: skip
                    p50 = statistics.median(r["latency_p50_ms"] for r in results)
                    p99 = statistics.median(r["latency_p99_ms"] for r in results)
                    worst = statistics.median(r["latency_max_ms"] for r in results)
                    print(f"  {label:<22} {rate:>8,.0f} msgs/s for {n / rate:.0f} s: p50 {p50:6.1f} ms   "
                          f"p99 {p99:6.1f} ms   max {worst:6.1f} ms")  # fmt: skip
            if "rss" not in args.skip:
                print()
                result = rss_run(broker, directory, args.rss_tags, args.protocol)
                print(f"`streamguard run` with {result['tags']:,} tags tracked: RSS {result['rss_mib']:.0f} MiB "
                      f"(at start {result['rss_at_start_mib']:.0f} MiB; after a second sample for every tag "
                      f"and a checkpoint {result['rss_after_checkpoint_mib']:.0f} MiB; "
                      f"peak while filling {result['peak_filling_mib']:.0f} MiB, "
                      f"overall {result['peak_mib']:.0f} MiB)")  # fmt: skip
        finally:
            broker.stop()


if __name__ == "__main__":
    main()
