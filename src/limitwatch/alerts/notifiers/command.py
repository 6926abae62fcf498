"""Run a site's own program for each notification, with the notification's JSON on its stdin.

Why these choices:

* ``argv`` is a list and no shell is involved, so nothing in a notification (a stream name, a
  rule text) can ever be interpreted as shell syntax.
* The program runs in a new session (its own process group). On timeout the whole group is
  killed, so a script that started helpers (``curl``, ``sleep``) leaves nothing behind.
* The event id is in the environment (``LIMITWATCH_EVENT_ID``) as well as the JSON, so a
  script can deduplicate without parsing.
* The program does not inherit the service's environment, which holds the credentials of the
  other notifiers (``password_env``, ``secret_env``): a pager script once saw the SMTP password.
  It gets a minimal environment -- ``PATH``, ``HOME``, ``TMPDIR``, ``TZ``, ``LANG`` and ``LC_*``
  from the service, so the program is found, can write temporary files and prints dates and text
  as the site expects -- plus the variables named in ``pass_env`` (a token the program itself
  needs) and the fixed, non-secret values in ``env``. A name in ``pass_env`` that the service's
  environment does not have is left out; the program decides whether that is fatal.
* A non-zero exit is retried: the outbox cannot know why the program failed, and a program
  that should not be retried can exit 0 after logging. A program that cannot be started at all
  is not retried (only a person can install it).

>>> CommandNotifier.Settings(type="command", name="pager", argv=["/usr/local/bin/page"]).timeout_s
30.0
>>> sorted(child_environment({"PATH": "/bin", "SMTP_PASSWORD": "x", "LC_TIME": "C"}, [], {}))
['LC_TIME', 'PATH']

References
----------
POSIX.1-2017, ``setsid()`` and ``kill()`` with a negative pid (signal a process group); Python
docs, ``subprocess.Popen(start_new_session=True)`` and ``os.killpg``.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import signal
import subprocess
from collections.abc import Mapping, Sequence
from typing import Any, Literal, Self

from pydantic import Field, field_validator

from limitwatch.alerts.notifiers.base import DeliveryError, Notifier, NotifierSettings

_TAIL = 500  # characters of stderr kept in an error message

#: Variables copied from the service's environment to every program: none of them holds a secret.
BASE_ENV = ("PATH", "HOME", "TMPDIR", "TZ", "LANG")
_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
# Names that say "I hold a credential": such values belong in pass_env, never in the config file.
_SECRET_NAME = re.compile(r"PASSW|SECRET|TOKEN|API_?KEY|PRIVATE|CREDENTIAL", re.IGNORECASE)
_EVENT_VAR = "LIMITWATCH_EVENT_ID"


def child_environment(
    parent: Mapping[str, str], pass_env: Sequence[str], fixed: Mapping[str, str]
) -> dict[str, str]:
    """The program's whole environment: the base names, ``LC_*``, ``pass_env`` names, ``fixed``."""
    env = {k: v for k, v in parent.items() if k in BASE_ENV or k.startswith("LC_")}
    env.update({k: parent[k] for k in pass_env if k in parent})
    env.update(fixed)
    return env


def _tail(data: bytes | None) -> str:
    text = (data or b"").decode("utf-8", "replace").strip()
    return text if len(text) <= _TAIL else "..." + text[-_TAIL:]


def _check_name(name: str) -> None:
    if not _ENV_NAME.fullmatch(name):
        raise ValueError(f"{name!r} is not an environment variable name (letters, digits, _)")
    if name == _EVENT_VAR:
        raise ValueError(f"{_EVENT_VAR} is set by limitwatch for every notification")


class CommandNotifier(Notifier):
    """Runs ``argv`` once per notification; exit status 0 means delivered."""

    class Settings(NotifierSettings):
        type: Literal["command"] = "command"
        argv: list[str] = Field(min_length=1)
        timeout_s: float = Field(30.0, gt=0, le=3600)
        pass_env: list[str] = Field(default_factory=list, max_length=100)
        env: dict[str, str] = Field(default_factory=dict, max_length=100)

        @field_validator("pass_env")
        @classmethod
        def _names(cls, names: list[str]) -> list[str]:
            for name in names:
                _check_name(name)
            return names

        @field_validator("env")
        @classmethod
        def _fixed(cls, values: dict[str, str]) -> dict[str, str]:
            for name, value in values.items():
                _check_name(name)
                if _SECRET_NAME.search(name):
                    raise ValueError(
                        f"env: {name} looks like a credential, and credentials cannot be written "
                        f"into the configuration; set it in the service's environment and list "
                        f'it in pass_env = ["{name}"] instead'
                    )
                if "\0" in value:
                    raise ValueError(f"env: the value of {name} contains a NUL character")
            return values

    def __init__(
        self,
        name: str,
        argv: list[str],
        *,
        timeout_s: float = 30.0,
        pass_env: Sequence[str] = (),
        env: Mapping[str, str] | None = None,
    ) -> None:
        super().__init__(name)
        if not argv or not argv[0]:
            raise ValueError("argv needs at least the program to run")
        self.argv = list(argv)
        self.timeout_s = timeout_s
        self.pass_env = tuple(pass_env)
        self.env = dict(env or {})

    @classmethod
    def from_settings(cls, settings: Settings) -> Self:
        return cls(
            settings.name,
            settings.argv,
            timeout_s=settings.timeout_s,
            pass_env=settings.pass_env,
            env=settings.env,
        )

    def deliver(self, notification: dict[str, Any], *, event_id: str) -> None:
        data = json.dumps({**notification, "event_id": event_id}, allow_nan=False).encode()
        env = {**child_environment(os.environ, self.pass_env, self.env), _EVENT_VAR: event_id}
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
