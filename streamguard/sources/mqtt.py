"""The MQTT connection: paho-mqtt 2.x (callback API version 2), the only module that imports paho.

One connection serves the live service both ways: it subscribes to the configured topic filters and
hands each message to a callback, and it publishes alarm events, per-tag state and the service status
(``online``, with ``offline`` as the last will). ``streamguard publish`` uses it as a plain publisher.

Why it is built this way:

- A persistent session (clean start off, a stable client id, an MQTT 5 session expiry) makes the broker
  keep our subscription and queue QoS 1 messages while we are disconnected; nothing published meanwhile
  is lost, as long as the broker's own queue limit (mosquitto: ``max_queued_messages``) holds it.
- We subscribe in the connect callback, so every reconnect subscribes again whatever the broker kept.
- The network loop is ours, not paho's ``loop_forever``: reconnect delays double from ``initial`` to
  ``max`` and each is drawn in [50 %, 100 %] of its nominal value (jitter), so clients restarted together
  do not hammer a broker in step.
- paho acknowledges a QoS 1 message when the message callback returns; the service's callback writes
  the message to its journal first, so what the broker considers delivered is on disk.
- Acknowledgements of our own publications arrive on the network thread with paho's locks held; they
  are only appended to ``acked`` here and handled by the service's processing thread.
"""

from __future__ import annotations

import logging
import os
import random
import ssl
import threading
import time
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.subscribeoptions import SubscribeOptions

from ..durations import parse_duration
from ..errors import ConfigError
from ..service_config import MqttSource

MessageHandler = Callable[[str, bytes, bool], None]
log = logging.getLogger("streamguard.mqtt")


def resolve_password(settings: MqttSource) -> str | None:
    """The password from its environment variable or file; the value itself is never logged."""
    if settings.password_env:
        value = os.environ.get(settings.password_env)
        if value is None:
            raise ConfigError(f"source.mqtt.password_env: environment variable {settings.password_env} is not set")
        return value
    if settings.password_file:
        try:
            return Path(settings.password_file).read_text(encoding="utf-8").rstrip("\r\n")
        except OSError as exc:
            raise ConfigError(f"source.mqtt.password_file: {settings.password_file}: cannot read "
                              f"({exc.strerror or exc})") from None  # fmt: skip
    return None


def backoff_delays(initial_s: float, max_s: float, rng: random.Random | None = None) -> Callable[[int], float]:
    """Delay before reconnect attempt ``n`` (0-based): min(max, initial * 2**n), times a uniform [0.5, 1)."""
    draw = (rng or random.Random()).random

    def delay(attempt: int) -> float:
        nominal = min(max_s, initial_s * (2.0 ** min(attempt, 30)))
        return nominal * (0.5 + 0.5 * draw())

    return delay


class MqttConnection:
    """A paho client with our network thread, reconnect policy and bookkeeping for the service."""

    def __init__(
        self,
        settings: MqttSource,
        *,
        client_id: str,
        persistent: bool,
        subscriptions: list[str] | None = None,
        on_message: MessageHandler | None = None,
        status_topic: str | None = None,
        max_in_flight: int = 1000,
    ) -> None:
        self.settings = settings
        self.client_id = client_id
        self.subscriptions = list(subscriptions or [])
        self.status_topic = status_topic
        self._on_message = on_message
        self.v5 = settings.protocol == "5"
        self.connected = False
        self.subscribed = False
        self.reconnects = 0  # successful connects after the first
        self.generation = 0  # increments on every successful connect
        self.connects = 0
        self.last_error = ""
        self.acked: deque[tuple[int, bool]] = deque()  # (mid, accepted) of our QoS 1 publications
        self.callback_errors = 0
        self._stop = threading.Event()
        self._stopped = False
        self._thread: threading.Thread | None = None
        self._subscribe_mid: int | None = None
        self._delay = backoff_delays(parse_duration(settings.reconnect.initial) / 1e9,
                                     parse_duration(settings.reconnect.max) / 1e9)  # fmt: skip
        protocol = paho.MQTTv5 if self.v5 else paho.MQTTv311
        if self.v5:
            client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=protocol)
        else:
            client = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=protocol,
                                 clean_session=not persistent)  # fmt: skip
        self.max_in_flight = max_in_flight
        client.max_inflight_messages_set(max_in_flight)
        client.max_queued_messages_set(0)
        client.enable_logger(logging.getLogger("streamguard.mqtt.paho"))
        if settings.username:
            client.username_pw_set(settings.username, resolve_password(settings))
        if settings.tls is not None:
            self._set_tls(client)
        if status_topic:
            client.will_set(status_topic, b"offline", qos=1, retain=True)
        client.on_connect = self._connected
        client.on_disconnect = self._disconnected
        client.on_subscribe = self._subscribed
        client.on_publish = self._published
        client.on_message = self._message
        properties = None
        if self.v5:
            properties = Properties(PacketTypes.CONNECT)
            properties.SessionExpiryInterval = settings.session_expiry_s if persistent else 0
        if self.v5:
            client.connect_async(settings.host, settings.port, settings.keepalive,
                                 clean_start=settings.clean_start or not persistent, properties=properties)  # fmt: skip
        else:
            client.connect_async(settings.host, settings.port, settings.keepalive)
        self.client = client

    def _set_tls(self, client: paho.Client) -> None:
        tls = self.settings.tls
        assert tls is not None
        try:
            client.tls_set(ca_certs=tls.ca_file, certfile=tls.cert_file, keyfile=tls.key_file,
                           cert_reqs=ssl.CERT_REQUIRED if tls.verify else ssl.CERT_NONE)  # fmt: skip
        except (OSError, ssl.SSLError, ValueError) as exc:
            raise ConfigError(f"source.mqtt.tls: cannot load the certificates ({exc})") from None
        if not tls.verify:
            client.tls_insecure_set(True)

    # -- lifecycle ---------------------------------------------------------------------------------
    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="mqtt-network", daemon=True)
        self._thread.start()

    def wait_connected(self, timeout: float) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.connected:
                return True
            time.sleep(0.02)
        return self.connected

    def stop(self, timeout: float = 2.0, offline: bool = True) -> None:
        """Publish ``offline`` (when connected), disconnect cleanly and end the network thread."""
        deadline = time.monotonic() + timeout
        if offline and self.status_topic and self.connected:
            info = self.client.publish(self.status_topic, b"offline", qos=1, retain=True)
            while not info.is_published() and self.connected and time.monotonic() < deadline - 0.2:
                time.sleep(0.01)
        self._stop.set()
        if self._thread is not None:
            self._thread.join(max(0.1, deadline - time.monotonic()))

    def _run(self) -> None:
        client = self.client
        # paho decides by this attribute whether a network thread owns the socket: with it set, publish()
        # from another thread queues the packet and wakes our select() instead of writing to the socket
        # itself, concurrently with this thread (which loses or interleaves packets).
        client._thread = threading.current_thread()
        attempt = 0
        socket_open = False
        while not self._stop.is_set():
            if not socket_open:
                try:
                    client.reconnect()
                    socket_open = True
                except (OSError, ssl.SSLError) as exc:
                    self.last_error = str(exc)
                    delay = self._delay(attempt)
                    attempt += 1
                    log.warning("broker unreachable", extra={"fields": {
                        "host": self.settings.host, "port": self.settings.port, "error": str(exc),
                        "retry_in_s": round(delay, 2)}})  # fmt: skip
                    self._stop.wait(delay)
                    continue
            rc = client.loop(timeout=0.05)
            if self.connected:
                attempt = 0
            if rc != MQTTErrorCode.MQTT_ERR_SUCCESS:
                socket_open = False
                self._mark_down(f"network loop: {paho.error_string(rc)}")
                delay = self._delay(attempt)
                attempt += 1
                self._stop.wait(delay)
        self._stopped = True
        if socket_open:
            client.disconnect()
            end = time.monotonic() + 0.5
            while time.monotonic() < end and client.socket() is not None:
                client.loop(timeout=0.05)
        self.connected = False
        self.subscribed = False

    def _mark_down(self, why: str) -> None:
        if self.connected and not self._stopped:
            log.warning("broker connection lost", extra={"fields": {"reason": why}})
        self.connected = False
        self.subscribed = False

    # -- paho callbacks (network thread) -----------------------------------------------------------
    def _connected(self, client: paho.Client, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        if reason.is_failure:
            self.last_error = f"connection refused: {reason}"
            log.error("broker refused the connection", extra={"fields": {"reason": str(reason)}})
            return
        # MQTT 5: never more QoS 1 publications in flight than the broker's Receive Maximum (mosquitto drops
        # a client that exceeds it). paho neither applies it nor lets the public setter change the limit
        # once connected, so the attribute behind that setter is written here, before paho sends anything.
        receive_maximum = getattr(properties, "ReceiveMaximum", None) if self.v5 else None
        client._max_inflight_messages = min(self.max_in_flight, int(receive_maximum or self.max_in_flight))
        self.connected = True
        self.connects += 1
        self.generation += 1
        if self.connects > 1:
            self.reconnects += 1
        log.info("connected to broker", extra={"fields": {
            "host": self.settings.host, "port": self.settings.port, "client_id": self.client_id,
            "session_present": bool(getattr(flags, "session_present", False)), "protocol": self.settings.protocol}})
        if self.subscriptions:
            qos = self.settings.qos
            if self.v5:
                # Retained messages only for a new subscription: a resumed session has seen them already.
                topics: list[Any] = [(f, SubscribeOptions(qos=qos, retainHandling=1)) for f in self.subscriptions]
            else:
                topics = [(f, qos) for f in self.subscriptions]
            _rc, self._subscribe_mid = client.subscribe(topics)
        if self.status_topic:
            client.publish(self.status_topic, b"online", qos=1, retain=True)

    def _subscribed(self, client: paho.Client, userdata: Any, mid: int, reasons: list[Any], properties: Any) -> None:
        failed = [str(r) for r in reasons if r.is_failure]
        if failed:
            self.last_error = "subscription refused: " + ", ".join(failed)
            log.error("broker refused a subscription", extra={"fields": {
                "filters": self.subscriptions, "reasons": failed}})  # fmt: skip
            return
        self.subscribed = True
        log.info("subscribed", extra={"fields": {"filters": self.subscriptions, "qos": self.settings.qos}})

    def _disconnected(self, client: paho.Client, userdata: Any, flags: Any, reason: Any, properties: Any) -> None:
        self._mark_down(str(reason))

    def _published(self, client: paho.Client, userdata: Any, mid: int, reason: Any, properties: Any) -> None:
        self.acked.append((mid, not reason.is_failure))

    def _message(self, client: paho.Client, userdata: Any, message: paho.MQTTMessage) -> None:
        if self._on_message is None:
            return
        try:
            self._on_message(message.topic, bytes(message.payload), bool(message.retain))
        except Exception:  # noqa: BLE001 - an exception here would end paho's network loop
            self.callback_errors += 1
            log.exception("message handler failed")

    # -- publishing (any thread) -------------------------------------------------------------------
    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False) -> int | None:
        """Hand a message to paho; returns its mid, or None when we are not connected (nothing queued)."""
        if not self.connected:
            return None
        info = self.client.publish(topic, payload, qos=qos, retain=retain)
        if info.rc not in (MQTTErrorCode.MQTT_ERR_SUCCESS, MQTTErrorCode.MQTT_ERR_NO_CONN):
            return None
        return int(info.mid)
