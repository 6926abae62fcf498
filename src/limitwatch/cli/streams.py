"""``limitwatch streams``: each stream's last value, zone, baseline and live incidents."""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import click

from limitwatch.cli.options import (
    InputProblem,
    clock,
    db_options,
    emit_json,
    fit_table,
    format_option,
    iso,
    opened,
    short_num,
)
from limitwatch.config import (
    ConfigError,
    load_config,
)
from limitwatch.durations import short_duration
from limitwatch.site_plan import weekly_false_alarms
from limitwatch.stats.baseline import Baseline as Limits
from limitwatch.stats.baseline import limits_of
from limitwatch.store import (
    Alert,
    Shelf,
    StreamRow,
)
from limitwatch.store import Baseline as StoredBaseline
from limitwatch.textout import num


def _zone(limits: Limits | None, value: float | None) -> str | None:
    if limits is None or value is None or not math.isfinite(value):
        return None
    return limits.zone(value)


def stream_record(
    row: StreamRow,
    current: StoredBaseline | None,
    live: Sequence[Alert],
    shelves: Sequence[Shelf],
    false_alarms_per_week: float | None = None,
    judged_by: StoredBaseline | None = None,
) -> dict[str, Any]:
    """The JSON object for one stream (``limitwatch streams --format json``). ``judged_by`` is
    the stored version that judged the last reading, when it is not ``current`` (a refit not
    adopted yet); its zone is told against that version's limits."""
    limits = limits_of(current.numbers) if current is not None else None
    judged = limits_of(judged_by.numbers) if judged_by is not None else limits
    whole = [s.until for s in shelves if s.rule is None]
    return {
        "stream": row.id,
        "last_value": row.last_value,
        "last_time": iso(row.last_time),
        "zone": _zone(judged, row.last_value),
        "phase": row.phase,
        "last_baseline_version": row.last_baseline_version,
        "baseline_version": None if current is None else current.version,
        "center": None if limits is None else limits.center,
        "lcl": None if limits is None else limits.lcl,
        "ucl": None if limits is None else limits.ucl,
        "open_alerts": sum(a.state == "open" for a in live),
        "acknowledged_alerts": sum(a.state == "acknowledged" for a in live),
        "live_alerts": len(live),
        "shelved_until": iso(max(whole)) if whole else None,
        "shelves": [
            {"rule": s.rule, "until": iso(s.until), "reason": s.reason, "by": s.shelved_by}
            for s in shelves
        ],
        "false_alarms_per_week": false_alarms_per_week,
    }


def false_alarms_by_stream(config_file: str | None, streams: Sequence[str]) -> dict[str, float]:
    """Each stream's expected false alarms a week from its configured rules and cadence
    (:mod:`limitwatch.planner`); streams without a cadence, or without ``--config``, are left
    out. The planner caches run lengths per rule set, so many streams cost little more than
    one."""
    if config_file is None:
        return {}
    try:
        config = load_config(config_file)
    except ConfigError as exc:
        raise InputProblem(str(exc)) from None
    return weekly_false_alarms(config, streams)


def _shelf_cell(shelves: Sequence[Shelf], now: float) -> str:
    if not shelves:
        return "-"
    until = max(s.until for s in shelves)
    rules = {s.rule for s in shelves}
    if None in rules:
        return f"all {short_duration(until - now)}"
    label = "1 rule" if len(rules) == 1 else f"{len(rules)} rules"
    return f"{label} {short_duration(until - now)}"


@click.command("streams")
@click.option(
    "--stream",
    "stream_glob",
    metavar="GLOB",
    help="Only streams whose id matches GLOB (shell-style, case-sensitive), e.g. 'oven-*'.",
)
@format_option()
@db_options
def streams_cmd(
    stream_glob: str | None, fmt: str, db_path: str | None, config_file: str | None
) -> None:
    """List the streams with their last reading, where it falls against the limits that judged
    it, their alerts and shelves, and the false alarms a week their rules should raise.

    In the table, 'zone' is the last reading's place against the baseline version that judged
    it (zone-c is within one sigma of the center line, zone-b within two, zone-a within three;
    above-ucl and below-lcl are beyond the limits; the current baseline for a reading stored
    before limitwatch recorded its version), 'baseline' the current version, 'live' counts
    the alerts not yet cleared (open or acknowledged: the report's 'live alerts' too),
    'shelved' what is shelved (all rules or which) and for how much longer. With --config,
    'false/wk' is the false alarms a week expected from the stream's rules at its cadence as
    the config gives them ('-' when it gives no cadence; the planner's figure, which assumes
    independent, normal readings). With --format json the output is a list of objects with
    the keys stream, last_value, last_time, zone, phase, last_baseline_version (the version
    that judged the last reading; null while learning or when not recorded),
    baseline_version, center, lcl, ucl (of the current version), open_alerts,
    acknowledged_alerts, live_alerts (the two together), shelved_until (a shelf of every
    rule), shelves (each with rule, until, reason, by) and false_alarms_per_week (null when
    unknown).

    \b
    Examples:
      limitwatch streams
      limitwatch streams --config /etc/limitwatch/site.toml
      limitwatch streams --stream 'pack-*' --format json
    """
    now = clock()
    with opened(db_path, config_file, now=now) as store:
        rows = store.streams(glob=stream_glob)
        live = store.live_alerts([r.id for r in rows])
        shelves = store.active_shelves(now)
        current = {r.id: store.current_baseline(r.id) for r in rows}
        judged_by = {
            r.id: store.baseline(r.id, v)
            for r in rows
            if (v := r.last_baseline_version) is not None
            and (c := current[r.id]) is not None
            and c.version != v
        }
    by_stream: dict[str, list[Alert]] = {}
    for alert in live:
        by_stream.setdefault(alert.stream, []).append(alert)
    shelves_of: dict[str, list[Shelf]] = {}
    for shelf in shelves:
        shelves_of.setdefault(shelf.stream, []).append(shelf)
    expected = false_alarms_by_stream(config_file, [r.id for r in rows])
    records = [
        stream_record(
            r,
            current[r.id],
            by_stream.get(r.id, []),
            shelves_of.get(r.id, []),
            expected.get(r.id),
            judged_by.get(r.id),
        )
        for r in rows
    ]
    if fmt == "json":
        emit_json(records)
        return
    if not records:
        where = f" matching {stream_glob!r}" if stream_glob else ""
        click.echo(f"No streams{where} have reported to this database yet.")
        return
    table_rows = [
        [
            rec["stream"],
            short_num(rec["last_value"]),
            rec["zone"] or "-",
            rec["phase"] or "-",
            "-" if rec["baseline_version"] is None else f"v{rec['baseline_version']}",
            str(rec["live_alerts"]),
            _shelf_cell(shelves_of.get(rec["stream"], []), now),
        ]
        for rec in records
    ]
    headers = ["stream", "last", "zone", "phase", "baseline", "live", "shelved"]
    if config_file is not None:
        # Only a config knows rules and cadences; without one the column would be all '-'
        # and cost the stream names ten columns.
        headers.append("false/wk")
        for cells, rec in zip(table_rows, records, strict=True):
            cells.append(num(rec["false_alarms_per_week"], 3))
    click.echo(fit_table(headers, table_rows, cuttable=[0, 6]))


# -- baselines -----------------------------------------------------------------------------------
