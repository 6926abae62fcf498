"""Where notifier credentials come from: an environment variable or a private file, never config.

Why: a configuration file is copied, mailed, diffed and committed; a password written into it
leaks with it. So settings name *where* a secret lives (``password_env``, ``secret_file``, ...)
and this module fetches it. A file that other users can read is refused rather than used,
because by the time limitwatch reads it the secret may already be known to every account on the
machine; the message says how to fix the mode.

>>> import os
>>> os.environ["LW_DOCTEST_TOKEN"] = "s3cret"
>>> resolve_secret(env="LW_DOCTEST_TOKEN", file=None, what="webhook secret")
's3cret'
>>> resolve_secret(env=None, file=None, what="webhook secret") is None
True

References
----------
The Twelve-Factor App, "III. Config" (https://12factor.net/config): credentials kept out of code
and config files, supplied by the environment. OpenSSH ssh(1), FILES: private keys "must not be
accessible by others" and are ignored otherwise -- the same stance as the mode check here.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path


class SecretError(Exception):
    """A secret was asked for but cannot be used; the message names the source and the fix."""


def resolve_secret(*, env: str | None, file: str | Path | None, what: str) -> str | None:
    """Read the secret named by ``env`` or ``file``; None when neither is given.

    ``what`` says what the secret is for ("SMTP password for notifier 'mail-ops'") so the error
    points at the right setting. A file's content loses one trailing newline (editors add one);
    other whitespace is kept, since it may be part of the secret.
    """
    if env is not None and file is not None:
        raise SecretError(
            f"{what}: give either an environment variable ({env}) or a file ({file}), not both."
        )
    if env is not None:
        return _from_env(env, what)
    if file is not None:
        return _from_file(Path(file), what)
    return None


def _from_env(name: str, what: str) -> str:
    value = os.environ.get(name)
    if value is None:
        raise SecretError(
            f"{what}: environment variable {name} is not set. Set it in the service's "
            "environment (e.g. an EnvironmentFile in the systemd unit)."
        )
    if value == "":
        raise SecretError(f"{what}: environment variable {name} is set but empty.")
    return value


def _from_file(path: Path, what: str) -> str:
    if "\0" in str(path):
        raise SecretError(f"{what}: secret file path {str(path)!r} contains a NUL character.")
    try:
        info = path.stat()
    except FileNotFoundError:
        raise SecretError(f"{what}: secret file {path} does not exist.") from None
    except (OSError, RuntimeError) as exc:  # RuntimeError: "~user" that does not exist
        raise SecretError(f"{what}: secret file {path} cannot be read ({exc}).") from None
    if not stat.S_ISREG(info.st_mode):
        raise SecretError(f"{what}: secret file {path} is not a regular file.")
    mode = stat.S_IMODE(info.st_mode)
    if mode & 0o077:
        raise SecretError(
            f"{what}: secret file {path} has mode {mode:04o}, so other users can read or change "
            f"it; limitwatch refuses to use it. Restrict it with: chmod 600 {path}"
        )
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise SecretError(f"{what}: secret file {path} cannot be read ({exc}).") from None
    if text.endswith("\r\n"):
        text = text[:-2]
    elif text.endswith("\n"):
        text = text[:-1]
    if text == "":
        raise SecretError(f"{what}: secret file {path} is empty.")
    return text
