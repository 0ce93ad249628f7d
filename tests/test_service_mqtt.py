"""The MQTT edges against a real mosquitto: persistent sessions keep what is published while we are away,
and the outbox publishes what was raised during a broker outage, in order, with the original ids."""

from __future__ import annotations

import json
import random
import subprocess
import time
from pathlib import Path

import pytest

from streamguard.config import parse_config
from streamguard.events import Event
from streamguard.service_config import MqttOutput, MqttSource
from streamguard.sinks.mqtt import MqttEventSink
from streamguard.sinks.outbox import Outbox
from streamguard.sources.mqtt import MqttConnection, backoff_delays

from .mqtt_broker import MOSQUITTO_PUB, Broker, Collector, available, wait_until

pytestmark = pytest.mark.skipif(not available(), reason="mosquitto or mosquitto-clients is not installed "
                                                          "(the test script installs them)")


def mqtt_settings(port: int, protocol: str = "5", client_id: str = "sg-test",
                  reconnect: tuple[str, str] = ("100ms", "500ms")) -> MqttSource:  # fmt: skip
    config = parse_config({"source": {"mqtt": {
        "host": "127.0.0.1", "port": port, "client_id": client_id, "protocol": protocol,
        "topics": [{"template": "plant/{tag}"}],
        "reconnect": {"initial": reconnect[0], "max": reconnect[1]}}}})  # fmt: skip
    assert config.source is not None
    return config.source.mqtt


def test_backoff_doubles_is_capped_and_jittered() -> None:
    delay = backoff_delays(1.0, 8.0, random.Random(4))
    for attempt, nominal in enumerate([1, 2, 4, 8, 8, 8]):
        draws = [delay(attempt) for _ in range(200)]
        assert all(0.5 * nominal <= d < nominal for d in draws)
        assert max(draws) - min(draws) > 0.3 * nominal  # spread, not lock-step


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_persistent_session_keeps_messages_published_while_away(tmp_path: Path, protocol: str) -> None:
    broker = Broker(tmp_path / "broker").start()
    received: list[tuple[str, bytes]] = []
    try:
        def keep(topic: str, payload: bytes, retained: bool) -> None:
            received.append((topic, payload))

        first = MqttConnection(mqtt_settings(broker.port, protocol), client_id="keeper", persistent=True,
                               subscriptions=["plant/+"], on_message=keep)  # fmt: skip
        first.start()
        wait_until(lambda: first.subscribed, 10, "subscription")
        first.stop(offline=False)
        for i in range(50):
            subprocess.run([MOSQUITTO_PUB, "-h", "127.0.0.1", "-p", str(broker.port), "-t", "plant/T1", "-q", "1",
                            "-m", str(i)], check=True, timeout=5)  # fmt: skip
        second = MqttConnection(mqtt_settings(broker.port, protocol), client_id="keeper", persistent=True,
                                subscriptions=["plant/+"], on_message=keep)  # fmt: skip
        second.start()
        wait_until(lambda: len(received) >= 50, 10, "the queued messages")
        second.stop(offline=False)
        assert [int(p) for _t, p in received] == list(range(50))
    finally:
        broker.stop()


def _event(i: int) -> Event:
    return Event(tag=f"T{i % 3}", detector="cusum", rule="cusum", kind="raise" if i % 2 == 0 else "clear",
                 ts_ns=1_772_409_600 * 10**9 + i * 10**9, value=float(i), statistic=5.5, limit=5.0, center=0.0,
                 sigma=1.0, subgroup_size=1, direction="up", limits_version="v1")  # fmt: skip


def test_events_raised_during_a_broker_outage_are_published_after_it_in_order(tmp_path: Path) -> None:
    broker = Broker(tmp_path / "broker").start()
    collector = Collector(broker, "streamguard/alarms/#", "outage-collector", tmp_path / "collected.txt")
    # The publisher reconnects after 4-8 s, the collector (mosquitto_sub) after about 1 s: the collector is
    # back before the backlog flows, so what is checked is the outbox, not the collector's broker session
    # (which survives kill -9 only if a save followed it: README, deployment notes).
    connection = MqttConnection(mqtt_settings(broker.port, reconnect=("8s", "8s")), client_id="sg-outbox",
                                persistent=True)  # fmt: skip
    try:
        collector.wait_subscribed("streamguard/alarms/probe")
        connection.start()
        wait_until(lambda: connection.connected, 10, "connection")
        outbox = Outbox(tmp_path / "outbox.sqlite")
        sink = MqttEventSink(connection, outbox, MqttOutput(state_topic=None), shadow=False)
        events = [_event(i) for i in range(60)]

        def submit(batch: list[Event]) -> None:
            records = [e.to_dict() for e in batch]
            outbox.add(sink.rows(batch, records))
            sink.pump()

        submit(events[:20])
        wait_until(lambda: (sink.pump(), outbox.backlog == 0)[1], 10, "the first events acknowledged")
        time.sleep(2.5)  # autosave_interval 1 saves about every 2 s (measured): let a save include ours
        broker.kill()
        wait_until(lambda: not connection.connected, 10, "the connection to drop")
        submit(events[20:40])  # raised while the broker is away: on disk, not published
        submit(events[40:])
        assert outbox.backlog == 40
        broker.start()
        collector.wait_subscribed("streamguard/alarms/probe")
        wait_until(lambda: (sink.pump(), outbox.backlog == 0)[1], 30, "the backlog published after the outage")
        wait_until(lambda: len(collector.messages()) >= 60, 20, "the collector to receive every event")
        received = [json.loads(p)["id"] for _t, p in collector.messages()]
        assert received == [e.id for e in events]  # all, once each, in the order raised
    finally:
        connection.stop(offline=False)
        collector.stop()
        broker.stop()
