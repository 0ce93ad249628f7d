"""Subcommands of the live service: ``streamguard run`` and ``streamguard publish``.

``cli.py`` finds this module and calls ``register``; errors the user can cause are raised as
``streamguard.errors`` classes and become exit code 2 there.
"""

from __future__ import annotations

import argparse

from .errors import UsageError


def cmd_run(args: argparse.Namespace) -> int:
    from .service import run_service

    return run_service(args.config, args.limits, args.shadow)


def _segments(pairs: list[str]) -> dict[str, str]:
    out = {}
    for pair in pairs:
        name, sep, value = pair.partition("=")
        if not sep or not name or not value:
            raise UsageError(f"--segment {pair!r}: write NAME=VALUE, e.g. --segment area=100")
        out[name] = value
    return out


def cmd_publish(args: argparse.Namespace) -> int:
    from .config import load_config
    from .publish import publish_files

    config = load_config(args.config)
    result = publish_files(config, args.files, speed=args.speed, host=args.host, port=args.port,
                           samples_per_message=args.samples_per_message, segments=_segments(args.segment),
                           qos=args.qos)  # fmt: skip
    rate = result.messages / result.seconds if result.seconds > 0 else 0.0
    print(f"published {result.samples:,} samples in {result.messages:,} messages from {result.tags} tags "
          f"in {result.seconds:.1f} s ({rate:,.0f} messages/s)")  # fmt: skip
    if result.unacknowledged:
        print(f"warning: {result.unacknowledged} messages were not acknowledged by the broker")
        return 1
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    run = subparsers.add_parser("run", help="the live service: MQTT in, alarm events out (runs until SIGTERM)")
    run.add_argument("--config", "-c", required=True, help="config with source/output/metrics/checkpoint sections")
    run.add_argument("--limits", "-l", help="limits file from `streamguard baseline`")
    run.add_argument("--shadow", action="store_true",
                     help="publish under output.mqtt.shadow_prefix, with its own client id and state, to watch the "
                          "alarm rate before cutting over")  # fmt: skip
    run.set_defaults(handler=cmd_run)

    publish = subparsers.add_parser("publish", help="play historian files into an MQTT broker at a chosen speed")
    publish.add_argument("--config", "-c", required=True, help="config whose source section says topics and payload")
    publish.add_argument("--speed", type=float, default=60.0,
                         help="data time per wall time, e.g. 60: an hour of data in a minute; 0: as fast as possible")
    publish.add_argument("--host", help="broker host (default: source.mqtt.host)")
    publish.add_argument("--port", type=int, help="broker port (default: source.mqtt.port)")
    publish.add_argument("--qos", type=int, choices=[0, 1, 2], help="default: source.mqtt.qos")
    publish.add_argument("--samples-per-message", type=int, default=1,
                         help="send a JSON list of up to N consecutive samples of a tag per message")
    publish.add_argument("--segment", action="append", default=[], metavar="NAME=VALUE",
                         help="value of a topic segment the tag name does not give")
    publish.add_argument("files", nargs="+", metavar="FILE")
    publish.set_defaults(handler=cmd_publish)
