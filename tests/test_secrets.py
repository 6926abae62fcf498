"""Secrets come from the environment or a private file, never from the configuration itself.

The file-mode rule follows OpenSSH's handling of private keys (ssh(1), FILES: a key readable by
others is refused), cited from memory; the check is ``mode & 0o077 == 0``.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from pydantic import ValidationError

from limitwatch.alerts.notifiers import validate_settings
from limitwatch.secrets import SecretError, resolve_secret


def test_secret_from_the_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("LW_TEST_HOOK_SECRET", "kiln-line-7f3a")
    assert resolve_secret(env="LW_TEST_HOOK_SECRET", file=None, what="hook") == "kiln-line-7f3a"


def test_missing_environment_variable_is_named(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("LW_TEST_ABSENT", raising=False)
    with pytest.raises(SecretError, match="LW_TEST_ABSENT is not set") as err:
        resolve_secret(env="LW_TEST_ABSENT", file=None, what="SMTP password of notifier 'mail'")
    assert "SMTP password of notifier 'mail'" in str(err.value)


def test_empty_environment_variable_is_refused(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("LW_TEST_EMPTY", "")
    with pytest.raises(SecretError, match="empty"):
        resolve_secret(env="LW_TEST_EMPTY", file=None, what="hook")


def test_private_file_is_read_without_one_trailing_newline(tmp_path: Path) -> None:
    path = tmp_path / "smtp-password"
    path.write_text("  spaces kept \n\n")
    path.chmod(0o600)
    # Exactly one newline goes: the second belongs to the content as written.
    assert resolve_secret(env=None, file=path, what="pw") == "  spaces kept \n"
    path.write_text("crlf-written\r\n")
    assert resolve_secret(env=None, file=str(path), what="pw") == "crlf-written"


@pytest.mark.parametrize("mode", [0o644, 0o640, 0o604, 0o660, 0o602])
def test_file_others_can_reach_is_refused_with_the_fix(tmp_path: Path, mode: int) -> None:
    path = tmp_path / "hook-secret"
    path.write_text("s3cret\n")
    path.chmod(mode)
    with pytest.raises(SecretError) as err:
        resolve_secret(env=None, file=path, what="signing secret of webhook 'ops'")
    message = str(err.value)
    assert str(path) in message
    assert f"{mode:04o}" in message
    assert f"chmod 600 {path}" in message
    assert "s3cret" not in message


def test_owner_read_only_file_is_fine(tmp_path: Path) -> None:
    path = tmp_path / "ro"
    path.write_text("abc")
    path.chmod(0o400)
    assert resolve_secret(env=None, file=path, what="pw") == "abc"


def test_missing_file_and_directory_are_named(tmp_path: Path) -> None:
    with pytest.raises(SecretError, match="does not exist"):
        resolve_secret(env=None, file=tmp_path / "nope", what="pw")
    folder = tmp_path / "dir"
    folder.mkdir(mode=0o700)
    with pytest.raises(SecretError, match="not a regular file"):
        resolve_secret(env=None, file=folder, what="pw")


def test_no_source_means_no_secret_and_two_sources_are_refused(tmp_path: Path) -> None:
    assert resolve_secret(env=None, file=None, what="pw") is None
    with pytest.raises(SecretError, match="not both"):
        resolve_secret(env="X", file=tmp_path / "y", what="pw")


@pytest.mark.parametrize(
    ("raw", "key"),
    [
        ({"type": "smtp", "name": "m", "host": "mail.local", "sender": "lw@plant.test",
          "recipients": ["ops@plant.test"], "username": "lw", "password": "hunter2"}, "password"),
        ({"type": "webhook", "name": "w", "url": "http://127.0.0.1/x", "secret": "abc"}, "secret"),
    ],
)  # fmt: skip
def test_inline_secrets_in_config_are_refused(raw: dict, key: str) -> None:
    with pytest.raises(ValidationError) as err:
        validate_settings(raw)
    text = str(err.value)
    assert f"'{key}' cannot be written into the configuration" in text
    assert f"{key}_env" in text and f"{key}_file" in text
    assert raw[key] not in text  # not echoed into a log either


def test_secret_file_mode_is_checked_when_a_notifier_is_built(tmp_path: Path) -> None:
    from limitwatch.alerts.notifiers import build_notifier

    path = tmp_path / "hook.key"
    path.write_text("abc\n")
    os.chmod(path, 0o644)
    raw = {"type": "webhook", "name": "w", "url": "http://127.0.0.1:9/x", "secret_file": path}
    with pytest.raises(SecretError, match=f"chmod 600 {path}"):
        build_notifier(raw)
    os.chmod(path, 0o600)
    assert build_notifier(raw).signs
