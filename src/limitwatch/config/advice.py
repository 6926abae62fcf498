"""What ``limitwatch check`` says beyond validation: warnings, and whether secrets and files
are there.

Why apart from validation: these look at the whole file (a glob another entry always shadows, an
escalation no route hears) or at the machine (a secret not set, a certificate missing), and a
config that fails them may still be loaded; ``check`` reports them, ``serve`` warns.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

from limitwatch.config.errors import Problem
from limitwatch.config.secret_keys import _SECRET_KEY

if TYPE_CHECKING:
    from limitwatch.config.model import Config


def config_warnings(config: Config) -> list[Problem]:
    """Things that are allowed but probably not meant; ``check`` prints them."""
    out: list[Problem] = []
    if not config.sources and config.bridge is None:
        out.append(Problem("sources", "no sources: the service would read nothing"))
    for i, source in enumerate(config.sources):
        out.extend(source.advice(f"sources[{i}]"))
    if config.bridge is not None:
        out.extend(config.bridge.advice())
    seen: dict[str, int] = {}
    for i, entry in enumerate(config.streams):
        if entry.match in seen:
            out.append(
                Problem(
                    f"streams[{i}].match",
                    f"same glob as streams[{seen[entry.match]}], which always wins",
                )
            )
        elif "*" in seen:
            out.append(
                Problem(f"streams[{i}].match", f"streams[{seen['*']}] matches '*' first")
            )
        seen.setdefault(entry.match, i)
    if config.alerts.escalate_after is not None and not any(r.escalate_to for r in config.routes):
        out.append(
            Problem(
                "alerts.escalate_after",
                "no route has escalate_to, so escalations reach nobody",
            )
        )
    if (
        config.alerts.repeat_every is not None
        and config.notifiers
        and not any("reminder" in r.notify_on and r.notifiers for r in config.routes)
    ):
        out.append(
            Problem(
                "alerts.repeat_every",
                'reminders are due but no route hears them; add "reminder" to a route\'s '
                'notify_on, or set repeat_every = "off"',
            )
        )
    if config.routes:
        used = {n for r in config.routes for n in (*r.notifiers, *r.escalate_to)}
        for i, notifier in enumerate(config.notifiers):
            if notifier.get("name") not in used:
                out.append(
                    Problem(f"notifiers[{i}]", f"{notifier.get('name')!r} is in no route")
                )
    elif config.notifiers:
        out.append(
            Problem(
                "routes", "no routes: every notifier gets the default notices but escalations"
            )
        )
    return out


def check_secrets(config: Config) -> list[Problem]:
    """Read every secret the config points at, the way start-up will; one problem per secret
    that is missing, empty, or in a file other users can read."""
    from limitwatch.secrets import SecretError, resolve_secret

    problems: list[Problem] = []
    for ref in config.secret_refs():
        try:
            resolve_secret(env=ref.env, file=ref.file, what=ref.what)
        except SecretError as exc:
            problems.append(Problem(ref.path, str(exc)))
    return problems


def check_files(config: Config) -> list[Problem]:
    """The other files the config names must be there: TLS certificates and CA files, and the
    folder the database goes in. (File-source globs may match nothing yet; that is allowed.)"""
    wanted: list[tuple[str, Path]] = []
    for i, source in enumerate(config.sources):
        wanted.extend(source.files_needed(f"sources[{i}]"))
    if config.bridge is not None:
        wanted.extend(config.bridge.files_needed())
    for i, entry in enumerate(config.notifiers):
        for key, value in entry.items():
            if key.endswith("_file") and not _SECRET_KEY.search(key[:-5]) and value is not None:
                wanted.append((f"notifiers[{i}].{key}", Path(value)))
    problems = [
        Problem(path, f"{file} does not exist" if not file.exists() else f"{file} is not a file")
        for path, file in wanted
        if not file.is_file()
    ]
    file = config.store.file
    if file is not None and not file.parent.is_dir():
        problems.append(Problem("store.path", f"the folder {file.parent} does not exist"))
    return problems
