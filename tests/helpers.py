"""Small shared helpers for the tests (not fixtures: plain functions)."""

from __future__ import annotations

import contextlib
import os
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

from click.testing import CliRunner

CLI = Path(sys.executable).with_name("limitwatch")


def run_cli(
    *args: str, cwd: Path | None = None, input: str | None = None, columns: int | None = 80
) -> subprocess.CompletedProcess[str]:
    """Run the installed console script in a process of its own, exactly as a user would,
    with ``$COLUMNS`` set to ``columns`` (as a terminal that wide would) or unset with None
    (output to a pipe).

    Starting a Python process per call costs about a second of CPU, so only the real-process
    smoke tests use this (they are marked ``integration``); the rest call :func:`cli`.
    """
    env = {k: v for k, v in os.environ.items() if k != "COLUMNS"}
    if columns is not None:
        env["COLUMNS"] = str(columns)
    return subprocess.run(
        [str(CLI), *args],
        capture_output=True,
        text=True,
        cwd=cwd,
        input=input,
        timeout=120,
        env=env,
    )


@dataclass(frozen=True)
class CliResult:
    """What a command printed and its exit status, named as on a finished process, so that a
    test reads the same whichever way the command ran."""

    returncode: int
    stdout: str
    stderr: str


def cli(
    *args: str,
    cwd: Path | None = None,
    input: str | None = None,
    env: dict[str, str | None] | None = None,
    columns: int | None = 80,
) -> CliResult:
    """Run ``limitwatch ARGS`` in this process with click's test runner.

    The same command object, options, output and exit status as the console script, without a
    new interpreter. An exception the command did not turn into an error message is raised here,
    so a crash cannot pass for an ordinary exit status 1. ``env`` sets (or, with None, unsets)
    environment variables for the call; ``$COLUMNS`` is ``columns`` (None: unset, as for output
    to a pipe), as in :func:`run_cli`.
    """
    from limitwatch.cli import main

    runner = CliRunner(env={"COLUMNS": None if columns is None else str(columns), **(env or {})})
    with contextlib.chdir(cwd) if cwd is not None else contextlib.nullcontext():
        result = runner.invoke(main, list(args), input=input, catch_exceptions=True)
    if result.exception is not None and not isinstance(result.exception, SystemExit):
        raise result.exception
    return CliResult(result.exit_code, result.stdout, result.stderr)


def examples(n: int) -> int:
    """``n`` hypothesis examples, or a quarter of them (at least 10) in the fast lane
    (``scripts/test.sh --fast`` sets HYPOTHESIS_PROFILE=fast); the full run keeps ``n``."""
    return max(10, n // 4) if os.environ.get("HYPOTHESIS_PROFILE") == "fast" else n


def write_csv(path: Path, header: list[str], rows: list[list[object]]) -> Path:
    lines = [",".join(header)] + [",".join(str(c) for c in row) for row in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
