"""What a notification says: one body for machines and one text for people.

Why one module: the webhook, MQTT and command notifiers send the body as JSON, the console and
e-mail show the text. Both are made here, once per notice, from the incident and the stream's
description and unit, so every channel tells the same story. The body follows a versioned,
documented schema (``docs/notification.schema.json``); the text drops internal detail (test
statistics, event ids) that the body keeps, and ends with the exact commands for the next step
and the safety caution.

>>> fmt_value(41.5312, sigma=3.1), fmt_value(0.004217, sigma=0.0003), fmt_value(12.0, None)
('41.5', '0.00422', '12')
>>> with_unit("41.5", "min"), with_unit("3", None), with_unit("98", "%")
('41.5 min', '3', '98 %')

References
----------
D. J. Wheeler, *Understanding Variation* (2nd ed., SPC Press, 2000): report the value with its
natural process limits, so the reader sees how far outside the usual noise it lies.
ANSI/ISA-18.2-2016 (cited from memory): an alarm should tell the operator what happened and
what to do about it.
"""

from __future__ import annotations

import math
import shlex
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from limitwatch import SAFETY_CAUTION
from limitwatch.durations import format_duration, format_elapsed
from limitwatch.ingest.timeparse import format_time
from limitwatch.textout import printable

if TYPE_CHECKING:
    from limitwatch.alerts.lifecycle import Notice
    from limitwatch.store import Alert

SCHEMA = "limitwatch.notification/1"
FLOOD_SCHEMA = "limitwatch.flood/1"
"""The ``schema`` value of every body; the number goes up when a field changes meaning or goes."""

RULE_WORDS: dict[str, str] = {
    "beyond-limits": "A reading fell outside the natural process limits "
    "(more than three sigma from the center line).",
    "two-of-three-zone-a": "Two of three consecutive readings fell more than two sigma from the "
    "center line on the same side (zone A or beyond).",
    "four-of-five-zone-b": "Four of five consecutive readings fell more than one sigma from the "
    "center line on the same side (zone B or beyond).",
    "run-one-side": "A long run of consecutive readings fell on the same side of the center "
    "line: the process average has probably shifted.",
    "trend": "Consecutive readings kept rising, or kept falling: the process is drifting.",
    "alternating": "Consecutive readings went up and down in turn, like a sawtooth: "
    "two sources may be alternating, or something is over-adjusting the process.",
    "hugging-center": "Many consecutive readings stayed within one sigma of the center line: "
    "the spread is smaller than the limits assume (stale limits or averaged data).",
    "avoiding-center": "Several consecutive readings fell more than one sigma from the center "
    "line, on either side, with none near it: readings may come from mixed sources.",
    "mr-beyond-limit": "The jump between two consecutive readings (the moving range) exceeded "
    "its upper limit: a sudden change.",
    "ewma": "The exponentially weighted moving average (EWMA) of recent readings crossed its "
    "limit: a small but sustained shift in the process average.",
    "cusum": "The cumulative sum (CUSUM) of deviations from the center line crossed its "
    "decision interval: a small but sustained shift in the process average.",
    "stale": "No reading has arrived for longer than expected: the sensor, gateway or export "
    "may have stopped.",
}
"""Each rule id in plain English, for notification texts."""

ZONE_WORDS = {
    "beyond": "beyond the natural process limits",
    "A": "zone A (two to three sigma from the center line)",
    "B": "zone B (one to two sigma)",
    "C": "zone C (within one sigma)",
}


def rule_words(rule: str) -> str:
    """The plain-English sentence for ``rule``; unknown rules still get a readable line.

    >>> rule_words("no-such-rule")
    "Rule 'no-such-rule' signalled a special cause."
    """
    return RULE_WORDS.get(rule, f"Rule {rule!r} signalled a special cause.")


def _said(rule: str, signal: dict[str, Any]) -> str:
    """:func:`rule_words`, but for a stale incident whose sender said it went offline (a
    Sparkplug death), what it said instead of a guess at why the readings stopped."""
    cause = signal.get("cause") if rule == "stale" else None
    if not cause:
        return rule_words(rule)
    return (
        f"No readings: {cause}. Its readings stop until it comes back (its next birth or data "
        "clears this)."
    )


@dataclass(frozen=True, slots=True)
class StreamInfo:
    """What the config says about a stream, for people: its description and unit."""

    description: str | None = None
    unit: str | None = None


# --------------------------------------------------------------------------- small formatters


def iso_time(t: float | None) -> str | None:
    """Epoch seconds as ISO 8601 UTC to the second (``2030-01-01T06:00:00Z``), by the one time
    formatter, :func:`limitwatch.ingest.timeparse.format_time`."""
    if t is None or not math.isfinite(t):
        return None
    return format_time(math.floor(t))


def fmt_value(x: float | None, sigma: float | None = None) -> str:
    """A reading with as many decimals as its spread makes meaningful: one digit below the
    first significant digit of sigma (a tenth of the usual noise), four significant figures
    when sigma is unknown."""
    if x is None or not isinstance(x, int | float) or not math.isfinite(x):
        return "n/a"
    if sigma is not None and isinstance(sigma, int | float) and math.isfinite(sigma) and sigma > 0:
        decimals = min(max(0, 1 - math.floor(math.log10(sigma))), 9)
        text = f"{x:.{decimals}f}"
        if decimals and "." in text:
            text = text.rstrip("0").rstrip(".")
        return text
    return f"{x:.4g}"


def with_unit(text: str, unit: str | None) -> str:
    return text if not unit or text in ("n/a", "-") else f"{text} {unit}"


def silence_words(silent_s: float, expected_s: float) -> str:
    """How long a stale stream has been silent against how soon a reading was due.

    >>> silence_words(7512.4, 2400.0)
    'no reading for 2h5m12s (expected within 40m)'
    """
    return (
        f"no reading for {format_elapsed(silent_s)} "
        f"(expected within {format_duration(expected_s)})"
    )


def _num(x: Any) -> float | None:
    return float(x) if isinstance(x, int | float) and math.isfinite(x) else None


def _quoted(stream: str) -> str:
    return shlex.quote(stream)


# --------------------------------------------------------------------------- the body

RECENT_READINGS = 60
"""How many of the stream's last readings a body carries for a chart."""

RECENT_FOR = frozenset({"opened", "raised", "reminder", "escalated", "cleared"})
"""Kinds whose body carries the recent readings (an acknowledgement needs no picture)."""


def recent_block(readings: Sequence[Any]) -> dict[str, Any]:
    """The last readings as plain lists (index, time, value, moving range, learning, rules
    that signalled), oldest first: what a receiver needs to draw the X and MR charts."""
    return {
        "index": [r.index for r in readings],
        "time": [r.time for r in readings],
        "value": [_num(r.value) for r in readings],
        "mr": [_num(r.mr) for r in readings],
        "learning": [r.phase == "learning" for r in readings],
        "signals": [list(r.signals or ()) for r in readings],
    }


def notification_payload(
    alert: Alert, notice: Notice, now: float, info: StreamInfo | None = None
) -> dict[str, Any]:
    """The JSON-safe body every notifier receives; ``event_id`` is stable across retries."""
    info = info or StreamInfo()
    sig = alert.signal
    silent_since = alert.silent_since
    rules = [
        {
            "rule": t.rule,
            "severity": t.severity,
            "count": t.signal_count,
            "first_time": t.first_time,
            "first_time_iso": iso_time(t.first_time),
            "last_time": t.last_time,
            "last_time_iso": iso_time(t.last_time),
            "words": _said(t.rule, t.signal),
        }
        for t in sorted(alert.rules.values(), key=lambda t: (t.first_time, t.rule))
    ]
    # How long the trouble lasted in the stream's own time: from its first signalling reading
    # to the reading that cleared it (the service may have read a backlog in seconds).
    lasted = max(0.0, alert.seen_time - alert.first_time) if alert.state == "cleared" else None
    payload: dict[str, Any] = {
        "schema": SCHEMA,
        "event_id": notice.event_id(alert.id),
        "kind": notice.kind,
        "number": notice.number,
        "incident_id": alert.id,
        "alert_id": alert.id,
        "state": alert.state,
        "stream": alert.stream,
        "description": info.description,
        "unit": info.unit,
        "rule": alert.rule,
        "rule_words": _said(alert.rule, sig),
        "rules": rules,
        "severity": alert.severity,
        "value": _num(alert.last_value),
        "time": alert.last_time,
        "time_iso": iso_time(alert.last_time),
        "first_time": alert.first_time,
        "first_time_iso": iso_time(alert.first_time),
        "opened_at": alert.opened_at,
        "opened_at_iso": iso_time(alert.opened_at),
        "worst_zone": alert.worst_zone,
        "chart": sig.get("chart"),
        "side": sig.get("side"),
        "center": _num(sig.get("center")),
        "sigma": _num(sig.get("sigma")),
        "ucl": _num(sig.get("ucl")),
        "lcl": _num(sig.get("lcl")),
        "mr": _num(sig.get("mr")),
        "mr_ucl": _num(sig.get("mr_ucl")),
        "statistic": _num(sig.get("statistic")),
        "limit": _num(sig.get("limit")),
        "baseline_version": sig.get("baseline_version"),
        "signal_count": alert.signal_count,
        "silent_since": silent_since,
        "silent_since_iso": iso_time(silent_since),
        "acknowledged_at": alert.acknowledged_at,
        "acknowledged_at_iso": iso_time(alert.acknowledged_at),
        "acknowledged_by": alert.acknowledged_by,
        "ack_note": alert.ack_note,
        "cleared_at": alert.cleared_at,
        "cleared_at_iso": iso_time(alert.cleared_at),
        "lasted_s": lasted,
        "cleared_through": alert.seen_time if alert.state == "cleared" else None,
        "created_at": now,
        "created_at_iso": iso_time(now),
        "commands": {
            "acknowledge": f"limitwatch ack {alert.id}",
            "chart": f"limitwatch chart {_quoted(alert.stream)}",
            "log": f"limitwatch log {alert.id}",
        },
        "caution": SAFETY_CAUTION,
    }
    payload["text"] = describe(payload)
    return payload


def flood_payload(flood: Any, policy: Any, now: float) -> dict[str, Any]:
    """The body of a flood notice: many incidents at once, named in one message."""
    window = format_duration(policy.flood_window_s)
    payload: dict[str, Any] = {
        "schema": FLOOD_SCHEMA,
        "event_id": f"{flood.id}:flood:0",
        "kind": "flood",
        "number": 0,
        "flood_id": flood.id,
        "started_at": flood.started_at,
        "started_at_iso": iso_time(flood.started_at),
        "threshold": policy.flood_after,
        "window_s": policy.flood_window_s,
        "changes": flood.changes,
        "streams": list(flood.streams),
        "created_at": now,
        "created_at_iso": iso_time(now),
        "commands": {"list": "limitwatch alerts", "acknowledge": "limitwatch ack --all-open"},
        "caution": SAFETY_CAUTION,
    }
    payload["text"] = (
        f"Flood: {flood.changes} incidents opened or cleared within {window}, more than the "
        f"{policy.flood_after} told one by one (common alarm-management target: at most ten "
        f"in ten minutes per operator). Streams: {', '.join(flood.streams)}. Their "
        "notifications are held while it lasts; 'limitwatch alerts' lists every incident, "
        f"'limitwatch ack --stream GLOB' acknowledges a group. {SAFETY_CAUTION}"
    )
    return payload


# --------------------------------------------------------------------------- the text


def _stream_words(p: dict[str, Any]) -> str:
    desc = p.get("description")
    return f"{p.get('stream', '?')} ({desc})" if desc else str(p.get("stream", "?"))


def headline(p: dict[str, Any]) -> str:
    """One line: what happened to which incident on which stream, and how severe. Control
    characters from field text are escaped (:func:`~limitwatch.textout.printable`): a newline
    in an e-mail subject could not be sent, an ESC would drive a terminal."""
    return printable(_headline(p))


def _headline(p: dict[str, Any]) -> str:
    kind = p.get("kind", "opened")
    n = p.get("incident_id", p.get("alert_id", "?"))
    severity = p.get("severity", "unknown")
    stream = p.get("stream", "?")
    if kind == "opened":
        return f"New {severity} incident {n} on {stream}"
    if kind == "raised":
        return f"Incident {n} on {stream} is now {severity}"
    if kind == "reminder":
        number = p.get("number", "")
        return f"Reminder {number}: {severity} incident {n} on {stream} is not acknowledged"
    if kind in ("escalated", "escalation"):
        return f"Escalation: {severity} incident {n} on {stream} is still not acknowledged"
    if kind == "acknowledged":
        return f"Incident {n} on {stream} acknowledged by {p.get('acknowledged_by') or 'someone'}"
    if kind == "cleared":
        return f"Incident {n} on {stream} is over"
    if kind == "shelved":
        shelf = p.get("shelf") or {}
        return f"Incident {n} on {stream} shelved until {shelf.get('until_iso', '?')}"
    if kind == "unshelved":
        return f"Incident {n} on {stream}: the shelf is over, notifications flow again"
    if kind == "flood":
        return f"Flood {p.get('flood_id', '?')}: {p.get('changes', '?')} incidents at once"
    return f"{kind}: incident {n} on {stream}"


def _value_lines(p: dict[str, Any]) -> list[tuple[str, str]]:
    """(label, text) pairs: what happened, the reading, the limits, since when."""
    unit, sigma = p.get("unit"), p.get("sigma")

    def v(x: Any) -> str:
        return with_unit(fmt_value(_num(x), sigma), unit)

    out: list[tuple[str, str]] = []
    words = [r.get("words") or rule_words(r.get("rule", "?")) for r in p.get("rules") or []]
    if not words and p.get("rule_words"):
        words = [p["rule_words"]]
    for w in words:
        out.append(("what", w))
    silent_since = p.get("silent_since")
    stale = "stale" in {r.get("rule") for r in p.get("rules") or []} or p.get("rule") == "stale"
    if stale and silent_since is None and p.get("rule") == "stale":
        # An older body: the time is when the check ran, the last reading came earlier.
        stat, when = _num(p.get("statistic")), _num(p.get("time"))
        if stat is not None and when is not None:
            silent_since = when - stat
    if silent_since is not None:
        # Silent as of the last check that found it so (the incident's last signal).
        created = _num(p.get("time")) or _num(p.get("created_at")) or silent_since
        limit = _num(p.get("limit"))
        silence = f"silent for {format_elapsed(created - silent_since)}"
        if limit is not None and p.get("rule") == "stale":
            silence += f" (expected within {format_duration(limit)})"
        last = "" if p.get("value") is None else f"{v(p.get('value'))} "
        out.append(("last reading", f"{last}at {iso_time(silent_since)}, {silence}"))
    elif p.get("value") is not None:
        out.append(("reading", f"{v(p.get('value'))} at {p.get('time_iso') or 'n/a'}"))
    if p.get("chart") == "mr":
        out.append(("limits", f"moving range {v(p.get('mr'))}, upper limit {v(p.get('mr_ucl'))}"))
    elif p.get("center") is not None:
        lcl = "none" if p.get("lcl") is None else v(p.get("lcl"))
        ucl = "none" if p.get("ucl") is None else v(p.get("ucl"))
        out.append(
            ("limits", f"{lcl} to {ucl} (natural process limits), center line {v(p.get('center'))}")
        )
    zone = p.get("worst_zone")
    if zone in ZONE_WORDS:
        out.append(("worst", ZONE_WORDS[zone]))
    if p.get("first_time_iso"):
        count = p.get("signal_count") or 1
        signals = f", {count} signals" if count > 1 else ""
        out.append(("since", f"{p['first_time_iso']}{signals}"))
    return out


def _kind_lines(p: dict[str, Any]) -> list[tuple[str, str]]:
    kind = p.get("kind")
    out: list[tuple[str, str]] = []
    if kind == "acknowledged":
        note = p.get("ack_note")
        who = p.get("acknowledged_by") or "someone"
        out.append(
            (
                "acknowledged",
                f"by {who} at {p.get('acknowledged_at_iso') or 'n/a'}"
                + (f": {note}" if note else ""),
            )
        )
    elif kind == "shelved":
        shelf = p.get("shelf") or {}
        out.append(
            (
                "shelved",
                f"by {shelf.get('by', 'someone')} until {shelf.get('until_iso', '?')}: "
                f"{shelf.get('reason', '')}",
            )
        )
    elif kind == "cleared":
        lasted = _num(p.get("lasted_s"))
        how = f"it lasted {format_elapsed(lasted)}" if lasted is not None else ""
        out.append(
            ("cleared", f"at {p.get('cleared_at_iso') or 'n/a'}" + (f"; {how}" if how else ""))
        )
    return out


def _next_lines(p: dict[str, Any]) -> list[tuple[str, str]]:
    cmds = p.get("commands") or {}
    kind = p.get("kind")
    out: list[tuple[str, str]] = []
    if kind in ("opened", "raised", "reminder", "escalated", "escalation") and cmds.get(
        "acknowledge"
    ):
        out.append(("acknowledge", f'{cmds["acknowledge"]} --note "what you are doing"'))
    if cmds.get("chart"):
        out.append(("chart", cmds["chart"]))
    return out


def text_lines(p: dict[str, Any]) -> list[tuple[str, str]]:
    """The human text as (label, text) pairs after the headline, caution last; control
    characters escaped, as in :func:`headline`."""
    return [(label, printable(text)) for label, text in _text_lines(p)]


def _text_lines(p: dict[str, Any]) -> list[tuple[str, str]]:
    if p.get("kind") == "flood":
        return [
            ("streams", ", ".join(p.get("streams") or [])),
            ("since", str(p.get("started_at_iso") or "n/a")),
            ("held", "each incident's own notifications, while the flood lasts"),
            ("list", "limitwatch alerts"),
            ("caution", str(p.get("caution") or SAFETY_CAUTION)),
        ]
    lines = [("stream", _stream_words(p))]
    if p.get("unit"):
        lines.append(("unit", str(p["unit"])))
    lines += _kind_lines(p)
    lines += _value_lines(p)
    lines += _next_lines(p)
    if p.get("caution"):
        lines.append(("caution", p["caution"]))
    return lines


def describe(payload: dict[str, Any]) -> str:
    """One paragraph for people: headline, what happened, reading and limits with the unit,
    the next step, and the caution."""
    parts = [headline(payload) + "."]
    for label, text in text_lines(payload):
        if label == "what" or label == "caution":
            parts.append(text)
        else:
            parts.append(f"{label.capitalize()}: {text}.")
    return " ".join(parts)
