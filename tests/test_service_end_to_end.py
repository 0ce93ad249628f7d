"""The live service as a process against a real mosquitto: it raises replay's events id for id, survives a
broker kill and its own SIGKILL without losing or changing an event, stops cleanly on SIGTERM, keeps its
config when a reload is broken, shows in its metrics what a test caused, and loses nothing in a burst.

Data: a slice of the demo (four tags, six hours of day 2, replay_data/quillmere-day2.csv.gz) with limits
from day 1 (``streamguard baseline``), the same files replay reads. Invented data, as the demo's.
"""

from __future__ import annotations

import gzip
import json
import signal
import subprocess
import threading
import time
from collections import Counter
from pathlib import Path
from typing import Any

import pytest
import yaml

from streamguard.config import load_config
from streamguard.journal import JournalWriter
from streamguard.limits import save_limits
from streamguard.phase1 import run_baseline
from streamguard.publish import publish_files
from streamguard.replay import run_replay
from streamguard.sources.mqtt import MqttConnection
from streamguard.state import CheckpointStore

from .mqtt_broker import (
    MOSQUITTO_PUB,
    MOSQUITTO_SUB,
    ROOT,
    STREAMGUARD,
    Broker,
    Collector,
    ServiceProcess,
    available,
    free_port,
    wait_until,
)

pytestmark = pytest.mark.skipif(not available(), reason="mosquitto or mosquitto-clients is not installed "
                                                          "(the test script installs them)")

TAGS = {"LT-305", "FT-202", "PT-402", "AT-301"}
DEMO = ROOT / "config" / "demo.yaml"


def _cut(source: Path, target: Path, start: str, end: str) -> int:
    rows = 0
    with gzip.open(source, "rt") as handle, target.open("w") as out:
        out.write(handle.readline())
        for line in handle:
            ts, tag, _rest = line.split(",", 2)
            if tag in TAGS and start <= ts < end:
                out.write(line)
                rows += 1
    return rows


class Demo:
    """Files, limits and replay's events for the slice; part A and part B split it at 13:00."""

    def __init__(self, directory: Path) -> None:
        self.directory = directory
        self.base = directory / "day1.csv"
        self.part_a = directory / "day2-a.csv"
        self.part_b = directory / "day2-b.csv"
        _cut(ROOT / "replay_data" / "quillmere-day1.csv.gz", self.base, "2026-03-02T00", "2026-03-03")
        self.rows_a = _cut(ROOT / "replay_data" / "quillmere-day2.csv.gz", self.part_a, "2026-03-03T10",
                           "2026-03-03T13")  # fmt: skip
        self.rows_b = _cut(ROOT / "replay_data" / "quillmere-day2.csv.gz", self.part_b, "2026-03-03T13",
                           "2026-03-03T16")  # fmt: skip
        config = load_config(DEMO)
        self.limits_path = directory / "limits.yaml"
        limits = run_baseline(config, [str(self.base)]).limits
        save_limits(limits, self.limits_path)
        self.expected = {e.id: e.to_dict() for e in run_replay(config, limits, [self.part_a, self.part_b]).events}
        self.expected_a = {e.id: e.to_dict() for e in run_replay(config, limits, [self.part_a]).events}

    @property
    def rows(self) -> int:
        return self.rows_a + self.rows_b

    def config(self, directory: Path, broker: Broker, metrics_port: int, **sections: Any) -> Path:
        data = yaml.safe_load(DEMO.read_text())
        data["source"] = {
            "mqtt": {"host": "127.0.0.1", "port": broker.port, "client_id": "sg-e2e",
                     "topics": [{"template": "quillmere/{tag}"}], "reconnect": {"initial": "200ms", "max": "1s"}},
            "payload": {"max_future": None, "retained_max_age": None},
        }  # fmt: skip
        data["output"] = {"jsonl": str(directory / "audit.jsonl")}
        data["metrics"] = {"listen": f"127.0.0.1:{metrics_port}"}
        data["checkpoint"] = {"directory": str(directory / "state"), "interval": "1s"}
        for key, value in sections.items():  # "section__key" sets a key inside a section; dicts are merged
            section, _, name = key.partition("__")
            holder, name = (data[section], name) if name else (data, key)
            old = holder.get(name)
            holder[name] = {**old, **value} if isinstance(old, dict) and isinstance(value, dict) else value
        directory.mkdir(parents=True, exist_ok=True)
        path = directory / "service.yaml"
        path.write_text(yaml.safe_dump(data, sort_keys=False))
        return path


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Demo:
    return Demo(tmp_path_factory.mktemp("demo"))


class Stack:
    """A broker, an independent collector of alarm events, and the service."""

    def __init__(self, demo: Demo, directory: Path, **sections: Any) -> None:
        self.demo = demo
        self.directory = directory
        self.broker = Broker(directory / "broker").start()
        try:
            self.metrics_port = free_port()
            self.config = demo.config(directory, self.broker, self.metrics_port, **sections)
            self.started_with = load_config(self.config)
            self.collector = Collector(self.broker, "streamguard/alarms/#", "e2e-collector", directory / "events.txt")
            self.collector.wait_subscribed("streamguard/alarms/probe")
        except BaseException:
            self.broker.stop()
            raise
        self.service = ServiceProcess(self.config, demo.limits_path, directory / "service.log", self.metrics_port)

    def publish(self, files: list[Path], speed: float = 0.0) -> None:
        """As ``streamguard publish`` does, with the config the stack started with."""
        publish_files(self.started_with, [str(f) for f in files], speed=speed)

    def events_by_id(self) -> tuple[dict[str, dict[str, Any]], Counter[str]]:
        events = self.collector.events()
        counts = Counter(e["id"] for e in events)
        by_id: dict[str, dict[str, Any]] = {}
        for event in events:
            assert by_id.setdefault(event["id"], event) == event, "one id, two different events"
        return by_id, counts

    def close(self) -> None:
        self.service.kill()
        self.collector.stop()
        self.broker.stop()


@pytest.fixture
def stack(demo: Demo, tmp_path: Path, request: pytest.FixtureRequest) -> Any:
    stacks: list[Stack] = []

    def make(**sections: Any) -> Stack:
        stacks.append(Stack(demo, tmp_path, **sections))
        return stacks[-1]

    yield make
    for s in stacks:
        s.close()


def test_live_events_equal_replay_id_for_id(stack: Any, demo: Demo, tmp_path: Path) -> None:
    """Publish the slice with `streamguard publish`; the alarm topic carries exactly replay's events."""
    s = stack()
    s.service.start()
    subprocess.run([STREAMGUARD, "publish", "--config", str(s.config), "--speed", "0", str(demo.part_a),
                    str(demo.part_b)], check=True, timeout=120, capture_output=True)  # fmt: skip
    wait_until(lambda: len(s.collector.messages()) >= len(demo.expected), 60, "every event on the alarm topic")
    time.sleep(0.5)
    by_id, counts = s.events_by_id()
    assert by_id == demo.expected
    assert max(counts.values()) == 1
    # The audit file holds the same events; the retained state of the alarming tag names its detectors.
    audit = [json.loads(line) for line in (tmp_path / "audit.jsonl").read_text().splitlines()]
    assert {e["id"]: e for e in audit} == demo.expected
    state = subprocess.run([MOSQUITTO_SUB, "-h", "127.0.0.1", "-p", str(s.broker.port), "-t",
                            "streamguard/state/LT-305", "-C", "1", "-W", "5"], capture_output=True, text=True,
                           timeout=10).stdout  # fmt: skip
    last = max((e for e in demo.expected.values() if e["tag"] == "LT-305"), key=lambda e: (e["ts"], e["kind"]))
    assert json.loads(state)["updated"] == last["ts"]
    metrics = s.service.metrics()
    assert sum(v for k, v in metrics.items() if k.startswith("streamguard_samples_total")) == demo.rows


def test_broker_killed_and_restarted_loses_and_changes_nothing(stack: Any, demo: Demo) -> None:
    """Over MQTT 3.1.1. Part A goes through; the broker is killed (kill -9) and restarted; part B is published
    while the service is still reconnecting, so it can only reach the service through its persistent session."""
    s = stack(source__mqtt={"protocol": "3.1.1", "reconnect": {"initial": "6s", "max": "8s"}})
    s.service.start()
    s.publish([demo.part_a])
    wait_until(lambda: len(s.collector.messages()) >= len(demo.expected_a), 60, "part A's events")
    wait_until(lambda: s.service.metrics()["streamguard_outbox_backlog"] == 0, 10, "the outbox to drain")
    # With autosave_interval 1 (tests/mqtt_broker.py) mosquitto saves about every 2 s (measured): a session
    # younger than its last save is gone after kill -9. Wait for a save that includes ours.
    time.sleep(2.5)
    s.broker.kill()
    s.broker.start()
    s.publish([demo.part_b])  # the service waits 3 to 6 s before its first reconnect attempt
    assert s.service.metrics()["streamguard_broker_connected"] == 0, "published before the service reconnected"
    wait_until(lambda: len(s.events_by_id()[0]) >= len(demo.expected), 60, "every event after the restart")
    by_id, counts = s.events_by_id()
    assert by_id == demo.expected
    metrics = s.service.metrics()
    assert metrics["streamguard_broker_reconnects_total"] >= 1
    assert metrics["streamguard_messages_received_total"] >= demo.rows
    reconnect = [r for r in s.service.log_records() if r.get("msg") == "connected to broker"][-1]
    assert reconnect["session_present"] is True


def test_service_killed_mid_stream_resumes_from_checkpoint_and_journal(stack: Any, demo: Demo) -> None:
    """The guarantee: every sample the broker delivered before the kill is in the journal, so the restarted
    service resumes the checkpointed state, processes the journal after it, then what the broker kept for
    its session. Events equal replay's; an event may arrive twice, with the same id and content."""
    s = stack()
    s.service.start()
    publisher = threading.Thread(target=s.publish, args=([demo.part_a, demo.part_b],), kwargs={"speed": 6000.0})
    publisher.start()
    wait_until(lambda: s.service.metrics()["streamguard_messages_received_total"] > demo.rows * 0.35, 60,
               "a third of the stream")  # fmt: skip
    wait_until(lambda: s.service.metrics()["streamguard_checkpoint_age_seconds"] >= 0, 10, "a first checkpoint")
    s.service.kill()
    s.service.start()
    publisher.join(120)
    wait_until(lambda: len(s.events_by_id()[0]) >= len(demo.expected), 60, "every event after the restart")
    by_id, counts = s.events_by_id()
    assert by_id == demo.expected
    records = s.service.log_records()
    resumed = [r for r in records if r.get("msg") == "resumed from checkpoint"]
    assert resumed and resumed[-1]["statistics_restarted"] == 0
    replayed = sum(r["messages"] for r in records if r.get("msg") == "journal processed")
    assert replayed > 0  # messages received after the last checkpoint and before the kill
    metrics = s.service.metrics()
    assert metrics["streamguard_journal_replayed_total"] == replayed
    assert metrics["streamguard_messages_received_total"] < demo.rows  # the rest came before the kill


def test_sigterm_stops_within_ten_seconds_with_a_final_checkpoint(stack: Any, demo: Demo, tmp_path: Path) -> None:
    s = stack(checkpoint={"directory": str(tmp_path / "state"), "interval": "1h"})
    s.service.start()
    s.publish([demo.part_a])
    wait_until(lambda: s.service.metrics()["streamguard_messages_received_total"] >= demo.rows_a, 60, "part A")
    started = time.monotonic()
    s.service.signal(signal.SIGTERM)
    assert s.service.wait(10) == 0
    assert time.monotonic() - started < 10
    checkpoint = CheckpointStore(tmp_path / "state" / "checkpoint.sqlite").load()
    assert checkpoint is not None
    assert checkpoint.position == JournalWriter(tmp_path / "state" / "journal").end  # everything received is in it
    counters = checkpoint.snapshot["arrays"]["counters"]["samples"]
    assert int(counters.sum()) == demo.rows_a
    status = subprocess.run([MOSQUITTO_SUB, "-h", "127.0.0.1", "-p", str(s.broker.port), "-t", "streamguard/status",
                             "-C", "1", "-W", "5"], capture_output=True, text=True, timeout=10).stdout  # fmt: skip
    assert status.strip() == "offline"
    assert [r for r in s.service.log_records() if r.get("msg") == "stopped"]


def test_sighup_with_a_broken_config_keeps_the_running_one(stack: Any, demo: Demo) -> None:
    s = stack()
    s.service.start()
    good = s.config.read_text()
    broken = yaml.safe_load(good)
    broken["detectors"]["cusum"]["h"] = -1
    s.config.write_text(yaml.safe_dump(broken))
    s.service.signal(signal.SIGHUP)
    wait_until(lambda: s.service.metrics().get('streamguard_config_reloads_total{outcome="rejected"}') == 1, 10,
               "the reload to be rejected")  # fmt: skip
    rejected = [r for r in s.service.log_records() if r.get("msg", "").startswith("reload rejected")]
    assert "detectors.cusum.h: must be > 0" in rejected[-1]["reason"]
    # Still running on the old config: the whole slice gives replay's events under the old settings.
    s.publish([demo.part_a, demo.part_b])
    wait_until(lambda: len(s.collector.messages()) >= len(demo.expected), 60, "every event")
    assert s.events_by_id()[0] == demo.expected
    # A valid change is applied.
    changed = yaml.safe_load(good)
    changed["alarms"]["clear_after"] = 20
    s.config.write_text(yaml.safe_dump(changed))
    s.service.signal(signal.SIGHUP)
    wait_until(lambda: s.service.metrics().get('streamguard_config_reloads_total{outcome="applied"}') == 1, 10,
               "the reload to be applied")  # fmt: skip
    applied = [r for r in s.service.log_records() if r.get("msg") == "reloaded config and limits"][-1]
    assert applied["statistics_restarted"] == 4  # all four tags, and the log names them
    assert sorted(applied["restarted_tags"]) == sorted(TAGS)


def test_metrics_and_health_show_what_the_test_caused(stack: Any, tmp_path: Path) -> None:
    s = stack(source__payload={"max_future": "5m"}, output__mqtt={"dead_letters_per_second": 100.0},
              metrics={"tag_labels": ["M-*"]}, tags={"M-*": {"baseline": {"mean": 0.0, "sigma": 1.0}}})  # fmt: skip
    dead = Collector(s.broker, "streamguard/dead-letter", "dead-collector", tmp_path / "dead.txt")
    dead.wait_subscribed("streamguard/dead-letter")
    s.service.start()
    assert s.service.metrics()["streamguard_broker_connected"] == 1

    now = time.time()
    sample = lambda k: json.dumps({"timestamp": round(now - 100 + k, 3), "value": 0.1 * k})  # noqa: E731
    payloads = [("quillmere/M-1", sample(k)) for k in range(10)]
    payloads += [("quillmere/M-1", sample(8)), ("quillmere/M-1", sample(9))]  # redelivered
    payloads += [("quillmere/M-1", "not json")] * 3
    payloads += [("quillmere/M-1", json.dumps({"timestamp": now + 3600, "value": 1.0}))]  # an hour ahead
    payloads += [("quillmere/M-1", json.dumps({"timestamp": now, "value": 1.0, "quality": "so-so"}))]
    for topic, payload in payloads:
        subprocess.run([MOSQUITTO_PUB, "-h", "127.0.0.1", "-p", str(s.broker.port), "-t", topic, "-q", "1",
                        "-m", payload], check=True, timeout=5)  # fmt: skip
    wait_until(lambda: s.service.metrics()["streamguard_messages_received_total"] == len(payloads), 10, "delivery")
    time.sleep(0.3)
    m = s.service.metrics()
    assert m['streamguard_samples_total{outcome="accepted"}'] == 10
    assert m["streamguard_duplicates_total"] == 2
    assert m['streamguard_decode_failures_total{reason="not_json"}'] == 3
    assert m['streamguard_decode_failures_total{reason="future_timestamp"}'] == 1
    assert m['streamguard_decode_failures_total{reason="bad_quality"}'] == 1
    assert m['streamguard_dead_letters_total{outcome="published"}'] == 5
    assert m["streamguard_tags_tracked"] == 1
    assert m['streamguard_tag_samples_total{outcome="accepted",tag="M-1"}'] == 10
    assert m["streamguard_processing_latency_seconds_count"] == len(payloads)
    assert m["streamguard_queue_depth"] == 0 and m["streamguard_subscribed"] == 1
    wait_until(lambda: len(dead.messages()) >= 5, 10, "dead letters")
    letters = Counter(json.loads(p)["reason"] for _t, p in dead.messages())
    assert letters == {"not_json": 3, "future_timestamp": 1, "bad_quality": 1}
    dead.stop()
    assert s.service.ready()
    s.broker.kill()
    wait_until(lambda: not s.service.ready(), 10, "/readyz to report the lost broker")
    assert s.service.metrics()["streamguard_broker_connected"] == 0


def _burst(stack: Any, messages: int, max_queued: int) -> dict[str, float]:
    s = stack(source__mqtt={"qos": 1})
    if max_queued:
        s.broker.stop()
        s.broker = Broker(s.directory / "broker-small", max_queued_messages=max_queued, port=s.broker.port).start()
        s.collector.stop()
    s.service.start()
    lines = "".join(json.dumps({"timestamp": 1_772_409_600_000 + k * 1000, "value": k % 7}) + "\n"
                    for k in range(messages))  # fmt: skip
    subprocess.run([MOSQUITTO_PUB, "-h", "127.0.0.1", "-p", str(s.broker.port), "-t", "quillmere/LT-305", "-q", "1",
                    "-l"], input=lines.encode(), check=True, timeout=60)  # fmt: skip
    previous = -1.0

    def settled() -> bool:
        nonlocal previous
        received = s.service.metrics()["streamguard_messages_received_total"]
        done = received == previous and s.service.metrics()["streamguard_queue_depth"] == 0
        previous = received
        return received >= messages or done

    wait_until(settled, 60, "the burst to be taken", interval=0.5)
    return s.service.metrics()


def test_burst_loses_nothing_with_max_queued_messages_raised(stack: Any) -> None:
    """20,000 QoS 1 messages as fast as mosquitto_pub sends them (tens of thousands per second here, faster
    than the service takes them). With the broker's queue limit raised, all arrive."""
    m = _burst(stack, 20_000, 0)
    assert m["streamguard_messages_received_total"] == 20_000
    assert sum(v for k, v in m.items() if k.startswith("streamguard_samples_total")) == 20_000
    assert m["streamguard_duplicates_total"] == 0


def test_burst_with_mosquittos_default_queue_limit_drops_messages(stack: Any) -> None:
    """The control: mosquitto's default max_queued_messages (1000) silently drops QoS 1 messages queued for a
    slow subscriber although the publisher got every PUBACK - why the shipped broker config raises it."""
    m = _burst(stack, 20_000, 1000)
    received = m["streamguard_messages_received_total"]
    print(f"with max_queued_messages 1000: {received:.0f} of 20000 messages arrived")
    assert received < 20_000


def test_mqtt_connection_module_is_the_only_paho_importer() -> None:
    package = ROOT / "streamguard"
    importers = sorted(str(p.relative_to(package)) for p in package.rglob("*.py") if "import paho" in p.read_text()
                       or "from paho" in p.read_text())  # fmt: skip
    assert importers == ["sources/mqtt.py"]
    assert MqttConnection.__module__ == "streamguard.sources.mqtt"
