"""Print each notification as a short labelled block on the service's stdout or stderr.

Why: the console is where a first installation, a demo and a container log are read, and where a
journal (systemd) picks notifications up with no other setup. The block is also the body of the
e-mail notifier, so a person sees the same words whichever channel reached them. The words come
from :mod:`limitwatch.alerts.messages`; this module only lays them out.

>>> note = {"kind": "opened", "incident_id": 7, "severity": "warning",
...         "stream": "pack-2/downtime", "description": "Unplanned downtime, packing line 2",
...         "unit": "min", "rule": "beyond-limits",
...         "rules": [{"rule": "beyond-limits", "words": "A reading fell outside the limits."}],
...         "value": 41.512, "sigma": 3.0, "time_iso": "2030-01-01T06:00:00Z", "chart": "x",
...         "center": 20.0, "lcl": 2.0, "ucl": 38.0, "signal_count": 1,
...         "first_time_iso": "2030-01-01T06:00:00Z",
...         "commands": {"acknowledge": "limitwatch ack 7",
...                      "chart": "limitwatch chart pack-2/downtime"},
...         "caution": "A monitoring aid, not a safety system."}
>>> print("\\n".join(notification_lines(note)))
limitwatch: New warning incident 7 on pack-2/downtime
  stream:       pack-2/downtime (Unplanned downtime, packing line 2)
  unit:         min
  what:         A reading fell outside the limits.
  reading:      41.5 min at 2030-01-01T06:00:00Z
  limits:       2 min to 38 min (natural process limits), center line 20 min
  since:        2030-01-01T06:00:00Z
  acknowledge:  limitwatch ack 7 --note "what you are doing"
  chart:        limitwatch chart pack-2/downtime
  caution:      A monitoring aid, not a safety system.

References
----------
D. J. Wheeler, *Understanding Variation* (2nd ed., SPC Press, 2000): report the value with its
natural process limits, so the reader sees how far outside the usual noise it lies.
"""

from __future__ import annotations

import sys
import textwrap
from typing import Any, Literal, Self

from limitwatch.alerts.messages import headline as _headline
from limitwatch.alerts.messages import text_lines
from limitwatch.alerts.notifiers.base import DeliveryError, Notifier, NotifierSettings

_LABEL_WIDTH = 14  # room for the longest label, "last reading:", and a space


def headline(notification: dict[str, Any]) -> str:
    """The block's first line: what happened to which incident, and how severe."""
    return f"limitwatch: {_headline(notification)}"


def notification_lines(notification: dict[str, Any], *, width: int = 78) -> list[str]:
    """The notification as labelled lines: stream and its description, unit, what happened in
    words, the reading and limits with the unit, since when, the next commands, the caution."""
    indent = " " * (_LABEL_WIDTH + 2)
    lines = [headline(notification)]
    for label, text in text_lines(notification):
        lines += textwrap.wrap(
            text,
            width,
            initial_indent=f"  {label + ':':<{_LABEL_WIDTH}}",
            subsequent_indent=indent,
            break_on_hyphens=False,
        ) or [f"  {label}:"]
    return lines


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
