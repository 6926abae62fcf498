"""The ``limitwatch`` command. Thin by design: parse options, call the library, print.

Every command that reads a file reports problems as one line naming the file, line and column,
and exits with status 1; option mistakes exit with status 2 (click's convention).

Layout: one module per command family, each holding its commands and nothing another command
module needs; what they share (the ``--db``/``--config``/``--format`` options, the error a user
can fix, opening the database) lives in :mod:`limitwatch.cli.options`. The command list below is
the one place a command is added: no module registers itself by being imported.
"""

from __future__ import annotations

import click

from limitwatch import __version__
from limitwatch.cli import (
    baseline,
    bench,
    bridge,
    charts,
    check,
    deadletters,
    demo,
    incidents,
    notifications,
    plan,
    replay,
    serve,
    shelves,
    streams,
)

COMMANDS: tuple[click.Command, ...] = (
    demo.demo_cmd,
    serve.serve_cmd,
    bridge.bridge_cmd,
    check.check,
    baseline.baseline,
    replay.replay_cmd,
    incidents.alerts_cmd,
    incidents.ack_cmd,
    shelves.shelve_cmd,
    shelves.unshelve_cmd,
    streams.streams_cmd,
    incidents.log_cmd,
    deadletters.dead_letters_cmd,
    notifications.notifications_cmd,
    charts.chart_cmd,
    charts.report_cmd,
    plan.plan,
    bench.bench_cmd,
)
"""Every top-level command, in the README's order (``--help`` lists them by name)."""


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="limitwatch")
def main() -> None:
    """Watch streams of individual readings with XmR charts and raise alerts on special causes.

    limitwatch is a monitoring aid, not a safety system: it does not replace interlocks, alarms
    required by local codes, or the judgement of qualified staff.
    """


for _command in COMMANDS:
    main.add_command(_command)

__all__ = ["COMMANDS", "main"]
