"""``limitwatch dead-letters``: what the service refused, and why.

Every input that could not become a reading (an unreadable payload, a value out of its natural
bounds, a repeat) is kept in the store's ``dead_letters`` table with its reason. This command is
how an integrator reads that table: filtered by source, reason and age, newest first, with the
raw payload shown safely (see :mod:`limitwatch.payloadview`).
"""

from __future__ import annotations

import dataclasses
from collections import Counter
from typing import Any

import click

from limitwatch.cli.options import (
    clock,
    db_options,
    emit_json,
    format_option,
    iso,
    iso_s,
    opened,
)
from limitwatch.durations import DurationError, parse_duration
from limitwatch.ingest.timeparse import TimeFormatError, parse_time
from limitwatch.payloadview import view_payload
from limitwatch.textout import printable


def split_reason(stored: str) -> tuple[str, str]:
    """(code, detail) of a stored reason ``"code: detail"``.

    >>> split_reason("bad-json: Expecting value"), split_reason("oversize")
    (('bad-json', 'Expecting value'), ('oversize', ''))
    """
    code, _, detail = stored.partition(":")
    return code.strip(), detail.strip()


def since_time(text: str, now: float) -> float:
    """Epoch seconds from ``--since``: a duration back from now (``2h``) or a time (ISO 8601
    or epoch seconds)."""
    stripped = text.strip()
    if stripped and stripped[-1].isalpha() and not stripped.endswith("Z"):
        try:
            return now - parse_duration(stripped)
        except DurationError:
            pass
    try:
        return parse_time(stripped)
    except TimeFormatError:
        raise click.BadParameter(
            f"{text!r} is neither a duration (e.g. 2h, 30m, 7d) nor a time "
            "(e.g. 2027-01-01T06:00:00Z)",
            param_hint="--since",
        ) from None


def find_dead_letters(
    store: Any,
    *,
    source: str | None,
    reason: str | None,
    since: float | None,
    last: int,
) -> tuple[list[dict[str, Any]], Counter[tuple[str, str]]]:
    """The newest ``last`` matching rows, and the count of every match by (source, reason)."""
    where: list[str] = ["1=1"]
    params: list[Any] = []
    if source is not None:
        where.append("source = ?")
        params.append(source)
    if reason is not None:
        where.append("(reason = ? OR substr(reason, 1, ?) = ?)")
        params += [reason, len(reason) + 1, reason + ":"]
    if since is not None:
        where.append("received_at >= ?")
        params.append(since)
    clause = " AND ".join(where)
    rows = store.sql.query(
        f"SELECT * FROM dead_letters WHERE {clause} ORDER BY id DESC LIMIT ?", [*params, last]
    )
    counts: Counter[tuple[str, str]] = Counter()
    for src, stored, n in store.sql.execute(
        f"SELECT source, reason, count(*) FROM dead_letters WHERE {clause} GROUP BY 1, 2",
        params,
    ):
        counts[(src, split_reason(stored)[0])] += n
    return rows, counts


def _record(row: dict[str, Any], payload_bytes: int) -> dict[str, Any]:
    code, detail = split_reason(row["reason"])
    view = view_payload(row.get("payload"), limit=payload_bytes, binary="base64")
    payload = view.to_json()
    if row.get("payload_size") is not None:  # stored cut already: its real size
        payload["size"] = row["payload_size"]
        payload["cut"] = payload["cut"] or row["payload_size"] > view.size
    if row.get("payload_sha256"):
        payload["sha256"] = row["payload_sha256"]
    return {
        "id": row["id"],
        "source": row["source"],
        "received_at": iso(row["received_at"]),
        "reason": code,
        "detail": detail,
        "payload": payload,
    }


@click.command("dead-letters")
@click.option("--source", metavar="NAME", help="Only inputs from this source (its config name).")
@click.option(
    "--reason",
    metavar="CODE",
    help="Only this reason, e.g. bad-json, not-a-number, missing-field, duplicate, late.",
)
@click.option(
    "--since",
    metavar="WHEN",
    help="Only inputs received in the last DURATION (2h, 7d) or since a time "
    "(2027-01-01T06:00:00Z).",
)
@click.option(
    "--last",
    type=click.IntRange(1),
    default=50,
    show_default=True,
    help="Show at most this many, newest first (the counts cover every match).",
)
@click.option(
    "--payload-bytes",
    type=click.IntRange(0),
    default=256,
    show_default=True,
    help="Show at most this many bytes of each payload; its full size is always given.",
)
@format_option()
@db_options
def dead_letters_cmd(
    source: str | None,
    reason: str | None,
    since: str | None,
    last: int,
    payload_bytes: int,
    fmt: str,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """List the inputs the service refused (dead letters), newest first, with the reason.

    Each shows its source, when it arrived, the reason code and what the reason says (the file
    and line, or the stream and time of the refused reading) and its raw payload: text with
    unprintable characters escaped (\\n, \\x1b, ...), anything that is not UTF-8 as hex, long
    payloads cut with their full size. An MQTT payload is stored after its topic and a newline.
    A summary by source and reason ends the list.

    With --format json the output is an object with "dead_letters" (a list of objects with id,
    source, received_at, reason, detail and payload: encoding "text" or "base64", data, size
    and cut) and "counts" (source, reason and count of every match).

    \b
    Examples:
      limitwatch dead-letters
      limitwatch dead-letters --source gateway --reason bad-json --since 2h
      limitwatch dead-letters --since 2027-01-01T06:00:00Z --format json
    """
    now = clock()
    start = None if since is None else since_time(since, now)
    with opened(db_path, config_file, now=now) as store:
        rows, counts = find_dead_letters(
            store, source=source, reason=reason, since=start, last=last
        )
    summary = [
        {"source": s, "reason": r, "count": n} for (s, r), n in sorted(counts.items())
    ]
    if fmt == "json":
        emit_json(
            {"dead_letters": [_record(r, payload_bytes) for r in rows], "counts": summary}
        )
        return
    if not rows:
        what = [f"from {source}" if source else "", f"as {reason}" if reason else ""]
        when = "" if start is None else f" since {iso_s(start)}"
        click.echo(f"No inputs refused{''.join(' ' + w for w in what if w)}{when}.")
        return
    for row in rows:
        code, detail = split_reason(row["reason"])
        view = view_payload(row.get("payload"), limit=payload_bytes)
        size = row.get("payload_size") or view.size
        if size > view.size:  # the store kept only the start of it
            view = dataclasses.replace(view, size=size, cut=True)
        click.echo(
            f"#{row['id']}  {iso_s(row['received_at'])}  {printable(row['source'])}  {code}"
        )
        if detail:
            click.echo(f"    {printable(detail)}")
        click.echo(f"    payload ({size} bytes): {view.one_line()}")
    total = sum(counts.values())
    shown = f"{len(rows)} shown of {total}" if total > len(rows) else f"{total}"
    parts = ", ".join(f"{s} {r} {n}" for (s, r), n in sorted(counts.items()))
    click.echo(f"{shown} refused input(s): {parts}.")
    if total > len(rows):
        click.echo("(--last N shows more; --format json for scripts)")
