"""Small shared helpers for the tests (not fixtures: plain functions)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

CLI = Path(sys.executable).with_name("limitwatch")


def run_cli(
    *args: str, cwd: Path | None = None, input: str | None = None, columns: int | None = 80
) -> subprocess.CompletedProcess[str]:
    """Run the installed console script, exactly as a user would, with ``$COLUMNS`` set to
    ``columns`` (as a terminal that wide would) or unset with None (output to a pipe)."""
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


def write_csv(path: Path, header: list[str], rows: list[list[object]]) -> Path:
    lines = [",".join(header)] + [",".join(str(c) for c in row) for row in rows]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
