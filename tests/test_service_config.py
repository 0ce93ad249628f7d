"""The service's config sections: defaults, errors that name the key path, secrets kept out of logs, and the
shipped container files (demo settings unchanged, broker queue limit raised)."""

from __future__ import annotations

import io
import json
import logging
import os
import re
from pathlib import Path

import pytest
import yaml

from streamguard.config import load_config, parse_config
from streamguard.errors import ConfigError
from streamguard.service import Service, pipeline_config, setup_logging
from streamguard.sources.mqtt import resolve_password

ROOT = Path(__file__).resolve().parent.parent
MINIMAL = {"source": {"mqtt": {"topics": [{"template": "plant/{area}/{tag}"}]}}}


def test_defaults_of_a_minimal_source() -> None:
    config = parse_config(MINIMAL)
    assert config.source is not None
    mqtt = config.source.mqtt
    assert (mqtt.protocol, mqtt.qos, mqtt.clean_start, mqtt.session_expiry_s) == ("5", 1, False, 86400)
    assert mqtt.topics[0].subscription == "plant/+/+"
    assert config.source.payload.format == "json" and config.source.unknown_tags == "track"
    assert config.output is None and config.metrics is None and config.checkpoint is None


def test_configs_without_service_sections_are_unchanged() -> None:
    """The pipeline's own settings and fingerprint do not depend on the service sections."""
    demo = load_config(ROOT / "config" / "demo.yaml")
    with_service = parse_config({**yaml.safe_load((ROOT / "config" / "demo.yaml").read_text()), **MINIMAL})
    assert pipeline_config(with_service) == pipeline_config(demo)


@pytest.mark.parametrize(("section", "message"), [
    ({"source": {"mqtt": {"topics": [{"template": "plant/{tag}"}], "port": 0}}}, "source.mqtt.port: must be >= 1"),
    ({"source": {"mqtt": {"topics": []}}}, "source.mqtt.topics"),
    ({"source": {"mqtt": {"topics": [{"template": "plant/#"}]}}}, "source.mqtt.topics.0.template"),
    ({"source": {"mqtt": {"topics": [{"template": "p/{a}", "tag": "{b}"}]}}}, "source.mqtt.topics.0: tag: {b}"),
    ({"source": {"mqtt": {"topics": [{"template": "p/{tag}"}], "protocol": "4"}}}, "source.mqtt.protocol"),
    ({"source": {"mqtt": {"topics": [{"template": "p/{tag}"}], "password_env": "X"}}}, "a password needs a username"),
    ({"source": {"mqtt": {"topics": [{"template": "p/{tag}"}], "tls": {"cert_file": "c.pem"}}}},
     "source.mqtt.tls: give cert_file and key_file together"),
    ({"source": {"mqtt": {"topics": [{"template": "p/{tag}"}]}, "batch_window": "soon"}}, "source.batch_window"),
    ({"source": {"mqtt": {"topics": [{"template": "p/{tag}"}]}, "paylod": {}}}, "source.paylod: unknown key"),
    ({"output": {"mqtt": {"alarm_topic": "alarms/{area}"}}}, "output.mqtt.alarm_topic: the only placeholder"),
    ({"output": {"mqtt": {"state_topic": "state/+/{tag}"}}}, "output.mqtt.state_topic"),
    ({"metrics": {"listen": "9108"}}, "metrics.listen: write host:port"),
    ({"metrics": {"max_tag_labels": 5000}}, "metrics.max_tag_labels: must be <= 1000"),
    ({"checkpoint": {"interval": "0s"}}, "checkpoint.interval"),
])  # fmt: skip
def test_errors_name_the_key_path(section: dict, message: str) -> None:
    with pytest.raises(ConfigError) as caught:
        parse_config(section)
    assert message in str(caught.value)


def test_run_needs_a_source_section(tmp_path: Path) -> None:
    path = tmp_path / "c.yaml"
    path.write_text("detectors: {cusum: {}}\n")
    with pytest.raises(ConfigError, match="source: `streamguard run` needs a source.mqtt section"):
        Service(str(path), install_signals=False)


def test_password_from_environment_or_file_is_never_logged(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    secret_file = tmp_path / "password"
    secret_file.write_text("s3cret-from-file\n")
    config = parse_config({"source": {"mqtt": {"topics": [{"template": "p/{tag}"}], "username": "sg",
                                               "password_file": str(secret_file)}}})  # fmt: skip
    assert config.source is not None
    assert resolve_password(config.source.mqtt) == "s3cret-from-file"
    unset = parse_config({"source": {"mqtt": {"topics": [{"template": "p/{tag}"}], "username": "sg",
                                              "password_env": "SG_TEST_NOT_SET"}}})  # fmt: skip
    assert unset.source is not None
    monkeypatch.delenv("SG_TEST_NOT_SET", raising=False)
    with pytest.raises(ConfigError, match="source.mqtt.password_env: environment variable SG_TEST_NOT_SET"):
        resolve_password(unset.source.mqtt)

    monkeypatch.setenv("SG_TEST_PASSWORD", "s3cret-from-env")
    data = {"source": {"mqtt": {"topics": [{"template": "p/{tag}"}], "username": "sg",
                                "password_env": "SG_TEST_PASSWORD"}},
            "metrics": {"listen": None}, "checkpoint": {"directory": str(tmp_path / "state")}}  # fmt: skip
    path = tmp_path / "service.yaml"
    path.write_text(yaml.safe_dump(data))
    stream = io.StringIO()
    setup_logging(stream, logging.DEBUG)
    service = Service(str(path), install_signals=False)
    service._announce()
    logged = stream.getvalue()
    assert json.loads(logged.splitlines()[0])["authenticated"] is True
    assert "s3cret" not in logged
    assert service.connection.client._password == b"s3cret-from-env"


def test_container_config_monitors_exactly_as_the_demo() -> None:
    demo = load_config(ROOT / "config" / "demo.yaml")
    container = load_config(ROOT / "docker" / "streamguard.yaml")
    assert pipeline_config(container) == pipeline_config(demo)
    assert container.source is not None and container.metrics is not None and container.checkpoint is not None
    assert container.metrics.listen == "0.0.0.0:9108"
    assert container.checkpoint.directory == "/var/lib/streamguard"


def test_shipped_broker_config_raises_the_queue_limit_and_sets_nodelay() -> None:
    """mosquitto's default max_queued_messages (1000) drops QoS 1 messages for a slow subscriber (measured on
    this machine, see the burst tests); Nagle's algorithm caps small QoS 1 messages (common practice)."""
    text = (ROOT / "docker" / "mosquitto.conf").read_text()
    settings = dict(re.findall(r"^(\w+)\s+(\S+)", text, flags=re.M))
    assert int(settings["max_queued_messages"]) >= 100_000 or settings["max_queued_messages"] == "0"
    assert settings["set_tcp_nodelay"] == "true"
    assert settings["persistence"] == "true"


def test_dockerfile_runs_as_a_user_checks_readiness_and_execs_the_service() -> None:
    text = (ROOT / "docker" / "Dockerfile").read_text()
    assert re.search(r"^FROM python:3\.11-slim", text, flags=re.M)
    assert re.search(r"^USER streamguard$", text, flags=re.M)
    assert "HEALTHCHECK" in text and "/readyz" in text
    assert re.search(r'^ENTRYPOINT \["streamguard"\]$', text, flags=re.M)  # exec form: signals reach us
    assert "NUMBA_CACHE_DIR" in text
    compose = yaml.safe_load((ROOT / "docker" / "compose.yaml").read_text())
    assert set(compose["services"]) == {"broker", "baseline", "streamguard", "publisher"}
    assert compose["services"]["publisher"]["command"][0] == "publish"
    assert os.path.basename(compose["services"]["broker"]["volumes"][0].split(":")[0]) == "mosquitto.conf"
