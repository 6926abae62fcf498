"""Print each notification as a short labelled block on the service's stdout or stderr.

Why: the console is where a first installation, a demo and a container log are read, and where a
journal (systemd) picks notifications up with no other setup. The block is also the body of the
e-mail notifier, so a person sees the same words whichever channel reached them.

>>> note = {"kind": "opened", "alert_id": 7, "severity": "warning", "stream": "pack-2/downtime",
...         "rule": "beyond-limits", "rule_words": "A reading fell outside the limits.",
...         "value": 41.5, "time_iso": "2030-01-01T06:00:00Z", "chart": "x", "center": 20.0,
...         "lcl": 2.0, "ucl": 38.0, "signal_count": 1, "event_id": "7:opened:0",
...         "caution": "A monitoring aid, not a safety system."}
>>> print("\\n".join(notification_lines(note)))
limitwatch: new alert 7, severity warning
  stream:    pack-2/downtime
  rule:      beyond-limits
             A reading fell outside the limits.
  reading:   41.5 at 2030-01-01T06:00:00Z
  limits:    center line 20, natural process limits 2 to 38
  event:     7:opened:0
  caution:   A monitoring aid, not a safety system.

A ``stale`` alert says how long the stream has been silent against how soon a reading was due,
in the units durations are written in, instead of a statistic in seconds:

>>> quiet = {**note, "rule": "stale", "statistic": 7512.0, "limit": 2400.0,
...          "time": 1_893_477_600.0}  # the check ran at 2030-01-01T06:00:00Z
>>> print("\\n".join(notification_lines(quiet)[4:6]))
  last:      41.5 at 2030-01-01T03:54:48Z
  silent:    no reading for 2h5m12s (expected within 40m)

References
----------
D. J. Wheeler, *Understanding Variation* (2nd ed., SPC Press, 2000): report the value with its
natural process limits, so the reader sees how far outside the usual noise it lies.
"""

from __future__ import annotations

import sys
import textwrap
from datetime import UTC, datetime
from typing import Any, Literal, Self

from limitwatch.alerts.notifiers.base import DeliveryError, Notifier, NotifierSettings
from limitwatch.durations import format_duration
from limitwatch.textout import printable


def _num(x: Any) -> str:
    return "n/a" if x is None else f"{x:.6g}" if isinstance(x, int | float) else str(x)


def _seconds(x: Any) -> bool:
    return isinstance(x, int | float) and not isinstance(x, bool) and 0 <= x < float("inf")


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="seconds").replace("+00:00", "Z")


def headline(notification: dict[str, Any]) -> str:
    """One line naming the kind, alert id and severity; used as the block's first line."""
    kind = notification.get("kind", "opened")
    if kind == "opened":
        words = "new alert"
    elif kind == "reminder":
        words = f"reminder {notification.get('number', '')}, unacknowledged alert"
    elif kind == "escalation":
        words = "escalation, unacknowledged alert"
    else:
        words = f"{kind}, alert"
    alert = notification.get("alert_id", "?")
    return f"limitwatch: {words} {alert}, severity {notification.get('severity', 'unknown')}"


def notification_lines(notification: dict[str, Any], *, width: int = 78) -> list[str]:
    """The notification as labelled lines: stream, rule in words, reading, limits, caution."""
    n = notification
    label = "  {:<11}".format  # room for the longest label, "statistic:", and a space
    indent = " " * 13
    lines = [headline(n), label("stream:") + str(n.get("stream", "?"))]
    lines.append(label("rule:") + str(n.get("rule", "?")))
    if n.get("rule_words"):
        lines += textwrap.wrap(
            n["rule_words"], width, initial_indent=indent, subsequent_indent=indent
        )
    silent, due = n.get("statistic"), n.get("limit")
    stale = n.get("rule") == "stale" and _seconds(silent) and _seconds(due)
    if stale:
        # The alert's time is when the check ran; the last reading came ``silent`` before it.
        when = n.get("time")
        last = _iso(when - silent) if isinstance(when, int | float) else None
        lines.append(label("last:") + f"{_num(n.get('value'))} at {last or 'n/a'}")
        lines.append(
            label("silent:")
            + f"no reading for {format_duration(round(silent))} "
            + f"(expected within {format_duration(due)})"
        )
    else:
        lines.append(label("reading:") + f"{_num(n.get('value'))} at {n.get('time_iso') or 'n/a'}")
    if n.get("chart") == "mr":
        limits = f"moving range {_num(n.get('mr'))}, upper limit {_num(n.get('mr_ucl'))}"
    else:
        limits = (
            f"center line {_num(n.get('center'))}, natural process limits "
            f"{_num(n.get('lcl'))} to {_num(n.get('ucl'))}"
        )
    lines.append(label("limits:") + limits)
    if not stale and n.get("statistic") is not None and n.get("limit") is not None:
        lines.append(label("statistic:") + f"{_num(n['statistic'])} against {_num(n['limit'])}")
    if (n.get("signal_count") or 1) > 1:
        lines.append(label("signals:") + f"{n['signal_count']} since it opened")
    lines.append(label("event:") + str(n.get("event_id", "?")))
    if n.get("caution"):
        lines += textwrap.wrap(
            n["caution"], width, initial_indent=label("caution:"), subsequent_indent=indent
        )
    return [printable(line) for line in lines]  # field text must not drive the terminal


class ConsoleNotifier(Notifier):
    """Writes :func:`notification_lines` and a blank line to the chosen stream, then flushes."""

    class Settings(NotifierSettings):
        type: Literal["console"] = "console"
        stream: Literal["stdout", "stderr"] = "stdout"

    def __init__(self, name: str, stream: Literal["stdout", "stderr"] = "stdout") -> None:
        super().__init__(name)
        self.stream = stream

    @classmethod
    def from_settings(cls, settings: Settings) -> Self:
        return cls(settings.name, settings.stream)

    def deliver(self, notification: dict[str, Any], *, event_id: str) -> None:
        # Looked up at each call, so a redirected sys.stdout (tests, daemons) is honoured.
        out = sys.stdout if self.stream == "stdout" else sys.stderr
        block = "\n".join(notification_lines({**notification, "event_id": event_id}))
        try:
            out.write(block + "\n\n")
            out.flush()
        except (OSError, ValueError) as exc:  # closed pipe or file
            raise DeliveryError(f"could not write to {self.stream}: {exc}", retryable=True) from exc
