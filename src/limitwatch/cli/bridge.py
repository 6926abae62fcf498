"""``limitwatch bridge``: MQTT -> Kafka for consumer-group workers."""

from __future__ import annotations

import logging
import sys

import click

from limitwatch import LOG_FORMAT
from limitwatch.cli.options import InputProblem
from limitwatch.config import ConfigError, check_secrets, load_config


@click.command("bridge")
@click.option(
    "--config",
    "config_path",
    required=True,
    type=click.Path(dir_okay=False),
    help="The TOML config file with a [bridge] section ([bridge.mqtt] and [bridge.kafka]).",
)
@click.option(
    "--log-level",
    type=click.Choice(["debug", "info", "warning", "error"]),
    default="info",
    show_default=True,
    help="How much to log on standard error.",
)
def bridge_cmd(config_path: str, log_level: str) -> None:
    """Forward MQTT readings to a Kafka topic, keyed by stream id, until SIGTERM or SIGINT.

    Each MQTT message (QoS 1, persistent session) is acknowledged only once Kafka has
    confirmed its record (acks=all, idempotent producer), in arrival order. Workers run
    `limitwatch serve` with a [[sources]] entry of type "kafka" on the same topic.

    \b
    Example:
      limitwatch bridge --config /etc/limitwatch/bridge.toml
    """
    logging.basicConfig(
        level=getattr(logging, log_level.upper()), format=LOG_FORMAT, stream=sys.stderr
    )
    try:
        config = load_config(config_path)
        problems = check_secrets(config)
        if problems:
            raise ConfigError(config_path, problems)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None
    except ValueError as exc:
        raise InputProblem(f"{config_path}: {exc}") from None
    if config.bridge is None:
        raise InputProblem(
            f"{config_path}: no [bridge] section; add [bridge.mqtt] (the broker and its "
            "[[bridge.mqtt.topics]]) and [bridge.kafka] (bootstrap_servers and topic)"
        )
    from limitwatch.ingest.kafka.bridge import run_bridge

    sys.exit(run_bridge(config.bridge))
