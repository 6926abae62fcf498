"""The rule that secrets are never written into the config file, and where they live instead.

Why refused wherever they are: a config file gets copied, mailed and committed. A key such as
``password`` or ``api_token`` holding a value is an error at any depth; ``*_env`` and ``*_file``
keys say where start-up reads the secret (:class:`SecretRef`).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

_SECRET_KEY = re.compile(r"(?:^|_)(?:password|passwd|secret|token|api_?key)$", re.IGNORECASE)


def _inline_secrets(
    data: Any, loc: tuple[str | int, ...] = ()
) -> list[tuple[tuple[str | int, ...], str]]:
    """Keys such as ``password`` or ``api_token`` holding a value: refused wherever they are."""
    found: list[tuple[tuple[str | int, ...], str]] = []
    if isinstance(data, Mapping):
        for key, value in data.items():
            if isinstance(key, str) and _SECRET_KEY.search(key):
                found.append(
                    (
                        (*loc, key),
                        "secrets are never written into the config file (it gets copied, "
                        f'mailed and committed); use {key}_env = "VARIABLE" to read it from '
                        f'the environment or {key}_file = "/path" for a file only the service '
                        "user can read",
                    )
                )
            else:
                found.extend(_inline_secrets(value, (*loc, key)))
    elif isinstance(data, list):
        for i, value in enumerate(data):
            found.extend(_inline_secrets(value, (*loc, i)))
    return found


def _without(data: Any, loc: tuple[str | int, ...]) -> Any:
    """A copy of ``data`` without the key at ``loc`` (it has been reported already)."""
    head, *rest = loc
    if isinstance(data, Mapping):
        if not rest:
            return {k: v for k, v in data.items() if k != head}
        return {k: (_without(v, tuple(rest)) if k == head else v) for k, v in data.items()}
    if isinstance(data, list) and isinstance(head, int):
        return [_without(v, tuple(rest)) if i == head else v for i, v in enumerate(data)]
    return data


@dataclass(frozen=True, slots=True)
class SecretRef:
    """A place the config says a secret lives; read with :func:`limitwatch.secrets.resolve_secret`
    at start-up (``check`` reads it too, to prove it is there)."""

    path: str
    env: str | None
    file: Path | None
    what: str

    @classmethod
    def either(
        cls, where: str, base: str, env: str | None, file: Path | None, what: str
    ) -> list[SecretRef]:
        """The secret behind a ``<base>_env`` / ``<base>_file`` key pair at ``where``, named by
        the key that was given (the environment variable's when both are); none when neither."""
        if env is None and file is None:
            return []
        key = f"{base}_env" if env is not None else f"{base}_file"
        return [cls(f"{where}.{key}", env, file, what)]

