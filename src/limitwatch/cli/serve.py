"""``limitwatch serve``: the always-on service."""

from __future__ import annotations

import logging
import sys

import click

from limitwatch import LOG_FORMAT, SAFETY_CAUTION
from limitwatch.cli.options import (
    InputProblem,
)
from limitwatch.config import (
    ConfigError,
    check_secrets,
    load_config,
)
from limitwatch.config.units import bare_durations_in


@click.command("serve")
@click.option(
    "--config",
    "config_path",
    required=True,
    type=click.Path(dir_okay=False),
    help="The TOML config file (see config/example.toml).",
)
@click.option(
    "--log-level",
    type=click.Choice(["debug", "info", "warning", "error"]),
    default="info",
    show_default=True,
    help="How much to log on standard error.",
)
def serve_cmd(config_path: str, log_level: str) -> None:
    """Run the monitoring service until SIGTERM or SIGINT.

    Readings from the configured MQTT topics and files are evaluated as they arrive; alerts go
    to the configured notifiers. On SIGTERM the batch in hand is committed and acknowledged,
    then the service disconnects and exits 0.

    One service per SQLite file: a second one on the same file exits at once. A PostgreSQL
    store (store.path = "postgresql://...") is shared instead: several services may run on it,
    each with its own streams, and no lock is taken.

    \b
    Example:
      limitwatch serve --config /etc/limitwatch/site.toml
    """
    logging.basicConfig(
        level=getattr(logging, log_level.upper()),
        format=LOG_FORMAT,
        stream=sys.stderr,
    )
    # APScheduler logs every job run at INFO; its warnings and errors are what matter here.
    logging.getLogger("apscheduler").setLevel(max(logging.WARNING, logging.root.level))
    try:
        config = load_config(config_path)
        problems = check_secrets(config)
        if problems:
            raise ConfigError(config_path, problems)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None
    except ValueError as exc:
        raise InputProblem(f"{config_path}: {exc}") from None
    from limitwatch.service import serve
    from limitwatch.service.lock import LockError
    from limitwatch.store import StoreError

    logging.getLogger("limitwatch").info(SAFETY_CAUTION)
    for warning in bare_durations_in(config_path):
        logging.getLogger("limitwatch").warning("%s: %s", config_path, warning)
    try:
        status = serve(config)
    except (LockError, StoreError) as exc:
        raise InputProblem(str(exc)) from None
    sys.exit(status)
