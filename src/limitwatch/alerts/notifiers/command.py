"""Run a site's own program for each notification, with the notification's JSON on its stdin.

Why these choices:

* ``argv`` is a list and no shell is involved, so nothing in a notification (a stream name, a
  rule text) can ever be interpreted as shell syntax.
* The program runs in a new session (its own process group). On timeout the whole group is
  killed, so a script that started helpers (``curl``, ``sleep``) leaves nothing behind.
* The event id is in the environment (``LIMITWATCH_EVENT_ID``) as well as the JSON, so a
  script can deduplicate without parsing.
* A non-zero exit is retried: the outbox cannot know why the program failed, and a program
  that should not be retried can exit 0 after logging. A program that cannot be started at all
  is not retried (only a person can install it).

>>> CommandNotifier.Settings(type="command", name="pager", argv=["/usr/local/bin/page"]).timeout_s
30.0

References
----------
POSIX.1-2017, ``setsid()`` and ``kill()`` with a negative pid (signal a process group); Python
docs, ``subprocess.Popen(start_new_session=True)`` and ``os.killpg``.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import subprocess
from typing import Any, Literal, Self

from pydantic import Field

from limitwatch.alerts.notifiers.base import DeliveryError, Notifier, NotifierSettings

_TAIL = 500  # characters of stderr kept in an error message


def _tail(data: bytes | None) -> str:
    text = (data or b"").decode("utf-8", "replace").strip()
    return text if len(text) <= _TAIL else "..." + text[-_TAIL:]


class CommandNotifier(Notifier):
    """Runs ``argv`` once per notification; exit status 0 means delivered."""

    class Settings(NotifierSettings):
        type: Literal["command"] = "command"
        argv: list[str] = Field(min_length=1)
        timeout_s: float = Field(30.0, gt=0, le=3600)

    def __init__(self, name: str, argv: list[str], *, timeout_s: float = 30.0) -> None:
        super().__init__(name)
        if not argv or not argv[0]:
            raise ValueError("argv needs at least the program to run")
        self.argv = list(argv)
        self.timeout_s = timeout_s

    @classmethod
    def from_settings(cls, settings: Settings) -> Self:
        return cls(settings.name, settings.argv, timeout_s=settings.timeout_s)

    def deliver(self, notification: dict[str, Any], *, event_id: str) -> None:
        data = json.dumps({**notification, "event_id": event_id}, allow_nan=False).encode()
        env = {**os.environ, "LIMITWATCH_EVENT_ID": event_id}
        program = f"command notifier {self.name!r} ({self.argv[0]})"
        try:
            proc = subprocess.Popen(
                self.argv,
                stdin=subprocess.PIPE,
                stdout=subprocess.DEVNULL,
                stderr=subprocess.PIPE,
                env=env,
                start_new_session=True,
                close_fds=True,
            )
        except OSError as exc:
            raise DeliveryError(f"{program} cannot be started: {exc}", retryable=False) from exc
        try:
            _, err = proc.communicate(data, timeout=self.timeout_s)
        except subprocess.TimeoutExpired:
            self._kill_group(proc)
            raise DeliveryError(
                f"{program} did not finish within {self.timeout_s:g} s; its process group was "
                "killed",
                retryable=True,
            ) from None
        except BaseException:
            self._kill_group(proc)
            raise
        if proc.returncode != 0:
            how = (
                f"was killed by signal {-proc.returncode}"
                if proc.returncode < 0
                else f"exited with status {proc.returncode}"
            )
            tail = _tail(err)
            raise DeliveryError(
                f"{program} {how}" + (f"; stderr: {tail}" if tail else ""), retryable=True
            )

    @staticmethod
    def _kill_group(proc: subprocess.Popen[bytes]) -> None:
        with contextlib.suppress(ProcessLookupError):  # pgid == pid: start_new_session
            os.killpg(proc.pid, signal.SIGKILL)
        try:
            proc.communicate(timeout=5)
        except subprocess.TimeoutExpired:
            # A descendant left the group (its own setsid) and still holds stderr open.
            proc.kill()
            proc.wait()
