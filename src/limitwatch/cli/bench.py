"""``limitwatch bench``: throughput, delay and memory measured on this machine.

Thin: :mod:`limitwatch.bench` does the measuring; this prints each figure with its conditions,
or one JSON document for comparing machines and versions.
"""

from __future__ import annotations

import json
import sys

import click

from limitwatch.bench import EXTRA_PARTS, PARTS, BenchStoreRefused, describe, machine, run
from limitwatch.store import StoreError


@click.command("bench")
@click.option("--quick", is_flag=True, help="Smaller runs: the whole bench in about a minute.")
@click.option("--json", "as_json", is_flag=True, help="One JSON document instead of text.")
@click.option(
    "--only",
    type=click.Choice(PARTS + EXTRA_PARTS),
    help="Measure one part only: engine, file, mqtt (with the bare subscriber), latency, "
    "memory (with restore time), or cluster (Kafka workers, the bridge and a failover; "
    "only when asked for).",
)
@click.option(
    "--store",
    metavar="URL",
    help="For --only cluster: the store the workers share. 'sqlite' (the default: a new file "
    "per run) or postgresql://user@host:port/database naming an EMPTY database made for the "
    "bench; it refuses one holding anything, and creates and drops a scratch schema per run "
    "inside it. A password goes in PGPASSWORD or ~/.pgpass.",
)
def bench_cmd(quick: bool, as_json: bool, only: str | None, store: str | None) -> None:
    """Measure readings per second, publish-to-commit delay and memory per stream here.

    Every figure is the median of repeated runs and is printed with the conditions it was
    measured under (streams, rules, batch settings, broker, load average). Engine rates are per
    second of CPU time, with wall-clock rates beside them; the engine is also compared with a
    flat yardstick (the same tests inlined in one function) in paired runs. Memory is the
    resident growth per stream after a restore, with tracemalloc's count beside it. The MQTT
    parts start a private Mosquitto on a free 127.0.0.1 port and are skipped with a message
    when it is not installed.
    Targets are shown for comparison; nothing fails when one is missed.

    \b
    Examples:
      limitwatch bench --quick
      limitwatch bench --only engine --json > engine.json
      limitwatch bench --quick --only cluster
      limitwatch bench --quick --only cluster --store postgresql://bench@127.0.0.1/scratch
    """

    def progress(text: str) -> None:
        click.echo(text, err=True)

    if store is not None and only != "cluster":
        raise click.UsageError(
            "--store applies to --only cluster alone; the other parts measure one service "
            "on its own SQLite file"
        )
    try:
        figures = run(only=only, quick=quick, progress=progress, store=store)
    except (BenchStoreRefused, StoreError) as exc:
        raise click.ClickException(f"--store: {exc}") from None
    if as_json:
        document = {
            "machine": machine(),
            "quick": quick,
            "figures": [f.to_dict() for f in figures],
        }
        json.dump(document, sys.stdout, indent=2)
        sys.stdout.write("\n")
        return
    info = machine()
    click.echo(
        f"limitwatch bench on {info['system']} {info['machine']}, {info['cpus']} CPUs, "
        f"Python {info['python']} ({info['implementation']}), "
        f"load average {info['load_average']} (1/5/15 min)"
        f"{' (quick sizes)' if quick else ''}"
    )
    for figure in figures:
        for line in describe(figure):
            click.echo(line)
