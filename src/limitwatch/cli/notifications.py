"""``limitwatch notifications``: are the notifications getting through?

The outbox table is the record of every notification owed: delivered, waiting for its next
attempt, or given up. This command reads it (and only reads it: it works beside a running
service) and answers per notifier: how many were delivered, how many wait and since when, how
many attempts failed and with what error, how many were given up. The undelivered rows follow,
newest first, so the failing ones can be looked at one by one.
"""

from __future__ import annotations

from typing import Any

import click

from limitwatch.alerts.outbox import GAVE_UP, PARKED_AT
from limitwatch.cli.options import (
    ago_text,
    clock,
    db_options,
    emit_json,
    fit_table,
    format_option,
    iso,
    iso_s,
    opened,
)
from limitwatch.textout import printable

STATES = ("waiting", "given-up", "delivered")


def row_state(row: dict[str, Any]) -> str:
    """``delivered``, ``given-up`` (parked for good) or ``waiting`` (its next attempt due)."""
    if row["delivered_at"] is not None:
        return "delivered"
    if row["next_attempt_at"] >= PARKED_AT or (row["last_error"] or "").startswith(GAVE_UP):
        return "given-up"
    return "waiting"


def summarise(rows: list[dict[str, Any]], now: float) -> list[dict[str, Any]]:
    """Per notifier (the row's route): counts by state, failed attempts, the oldest waiting
    row and the last error of a waiting one."""
    out: dict[str, dict[str, Any]] = {}
    for row in rows:
        s = out.setdefault(
            row["route"],
            {
                "notifier": row["route"],
                "delivered": 0,
                "waiting": 0,
                "given_up": 0,
                "failed_attempts": 0,
                "oldest_waiting_at": None,
                "last_error": None,
                "_last_error_at": None,
            },
        )
        state = row_state(row)
        s["given_up" if state == "given-up" else state] += 1
        s["failed_attempts"] += row["attempts"]  # counts failures only (Store.mark_failed)
        if state == "waiting":
            if s["oldest_waiting_at"] is None or row["created_at"] < s["oldest_waiting_at"]:
                s["oldest_waiting_at"] = row["created_at"]
            if row["last_error"] and (
                s["_last_error_at"] is None or row["id"] > s["_last_error_at"]
            ):
                s["last_error"], s["_last_error_at"] = row["last_error"], row["id"]
    result = []
    for s in sorted(out.values(), key=lambda x: x["notifier"]):
        s.pop("_last_error_at")
        oldest = s["oldest_waiting_at"]
        s["oldest_waiting_age_s"] = None if oldest is None else round(now - oldest, 3)
        s["oldest_waiting_at"] = iso(oldest)
        result.append(s)
    return result


def _record(row: dict[str, Any]) -> dict[str, Any]:
    state = row_state(row)
    return {
        "id": row["id"],
        "notifier": row["route"],
        "alert_id": row["alert_id"],
        "state": state,
        "created_at": iso(row["created_at"]),
        "attempts": row["attempts"],
        "next_attempt_at": iso(row["next_attempt_at"]) if state == "waiting" else None,
        "delivered_at": iso(row["delivered_at"]),
        "last_error": row["last_error"],
    }


@click.command("notifications")
@click.option("--notifier", metavar="NAME", help="Only this notifier's notifications.")
@click.option(
    "--state",
    type=click.Choice([*STATES, "all"]),
    default="waiting",
    show_default=True,
    help="Which notifications to list after the summary ('given-up' ones will not be sent).",
)
@click.option(
    "--last",
    type=click.IntRange(1),
    default=20,
    show_default=True,
    help="List at most this many, newest first (the summary covers all of them).",
)
@format_option()
@db_options
def notifications_cmd(
    notifier: str | None,
    state: str,
    last: int,
    fmt: str,
    db_path: str | None,
    config_file: str | None,
) -> None:
    """Are notifications getting through? Per notifier: delivered, waiting, failed attempts
    and given up, with the oldest waiting one and the last error; then the notifications
    themselves, newest first (by default those still waiting).

    A waiting notification is retried with backoff until it is delivered or given up
    (give_up_after). With --format json the output is an object with "notifiers" (notifier,
    delivered, waiting, given_up, failed_attempts, oldest_waiting_at, oldest_waiting_age_s,
    last_error) and "notifications" (id, notifier, alert_id, state, created_at, attempts,
    next_attempt_at, delivered_at, last_error); times are UTC ISO 8601.

    \b
    Examples:
      limitwatch notifications
      limitwatch notifications --notifier ops-hook --state given-up --format json
    """
    now = clock()
    with opened(db_path, config_file, now=now) as store:
        where, params = ("WHERE route = ?", (notifier,)) if notifier else ("", ())
        rows = store.sql.query(f"SELECT * FROM outbox {where} ORDER BY id DESC", params)
    summary = summarise(rows, now)
    chosen = [r for r in rows if state == "all" or row_state(r) == state][:last]
    if fmt == "json":
        emit_json({"notifiers": summary, "notifications": [_record(r) for r in chosen]})
        return
    if not rows:
        which = f" for {notifier}" if notifier else ""
        click.echo(f"No notifications{which} have been queued.")
        return
    click.echo(
        fit_table(
            ["notifier", "delivered", "waiting", "failed tries", "given up", "oldest waiting"],
            [
                [
                    s["notifier"],
                    str(s["delivered"]),
                    str(s["waiting"]),
                    str(s["failed_attempts"]),
                    str(s["given_up"]),
                    "-"
                    if s["oldest_waiting_at"] is None
                    else ago_text(now - s["oldest_waiting_age_s"], now),
                ]
                for s in summary
            ],
            cuttable=[0],
        )
    )
    for s in summary:
        if s["last_error"]:
            click.echo(f"{s['notifier']}: last error: {printable(s['last_error'])}")
    if not chosen:
        click.echo(f"No {state} notifications." if state != "all" else "")
        return
    click.echo("")
    click.echo(
        fit_table(
            ["id", "notifier", "alert", "state", "queued", "tries", "next try / error"],
            [
                [
                    str(r["id"]),
                    r["route"],
                    "-" if r["alert_id"] is None else str(r["alert_id"]),
                    row_state(r),
                    iso_s(r["created_at"]),
                    str(r["attempts"]),
                    printable(r["last_error"] or "")
                    if row_state(r) != "waiting"
                    else f"{iso_s(r['next_attempt_at'])} {printable(r['last_error'] or '')}",
                ]
                for r in chosen
            ],
            cuttable=[1, 6],
        )
    )
