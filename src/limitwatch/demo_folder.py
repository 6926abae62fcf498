"""The demo's folder: made and marked by the demo, and the only kind of folder it will clear.

``limitwatch demo --folder DIR`` used to delete DIR whenever it held a ``demo.toml``, which
took a checkout's ``config/`` folder with it. Now the demo writes a marker file into a folder
it makes (or into an empty one), and on a second run removes only the files it wrote there
itself, after saying what the earlier run's database held. Anything else in the folder stays.
"""

from __future__ import annotations

import sqlite3
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from limitwatch.demo import SPARKPLUG_SOURCE

MARKER = ".limitwatch-demo"
MARKER_TEXT = (
    "This folder was made by `limitwatch demo`. Running the demo here again replaces the files\n"
    "it wrote (its config, data, database and private broker files) and keeps anything else.\n"
)


class DemoFolderError(Exception):
    """The folder is not one the demo may write into."""


@dataclass
class Replaced:
    """What a new demo run is about to remove from a folder an earlier run made."""

    removed: list[str] = field(default_factory=list)
    kept: list[str] = field(default_factory=list)
    alerts: int = 0
    acknowledged: int = 0
    refits: int = 0

    def describe(self, root: Path) -> str:
        text = (
            f"Replacing the earlier demo in {root}: its database ({self.alerts} alerts, "
            f"{self.acknowledged} acknowledged, {self.refits} refitted baselines) and its data "
            "are removed."
        )
        if self.kept:
            text += f" Kept, as the demo did not make them: {', '.join(self.kept)}."
        return text


def demo_files(config_text: str) -> list[str]:
    """The paths, relative to the folder, that a demo run writes (the database's name comes
    from the demo config, so the two cannot disagree)."""
    db = str(tomllib.loads(config_text)["store"]["path"])
    return [
        "demo.toml",
        db,
        f"{db}-wal",
        f"{db}-shm",
        f"{db}-journal",
        f"{db}.lock",
        f"{db}.source-{SPARKPLUG_SOURCE}.json",
        "data/plant.csv",
        "broker/mosquitto.conf",
        "broker/mosquitto.log",
    ]


def prepare(root: Path, config_text: str) -> Replaced | None:
    """Make ``root`` ready for a demo run and mark it as the demo's.

    A missing or empty folder is made and marked. A marked folder loses the files an earlier
    run wrote (returned, with what its database held, so the caller can say so). Any other
    folder is refused with :class:`DemoFolderError`, and nothing in it is touched.
    """
    replaced: Replaced | None = None
    if root.exists():
        if (root / MARKER).is_file():
            replaced = _clear(root, config_text)
        elif any(root.iterdir()):
            raise DemoFolderError(
                f"{root} is not a limitwatch demo folder (it is not empty and has no {MARKER} "
                "file), so the demo will not write into it or delete anything there; choose "
                "another --folder, or a new or empty one"
            )
    (root / "data").mkdir(parents=True, exist_ok=True)
    (root / MARKER).write_text(MARKER_TEXT, encoding="utf-8")
    return replaced


def _clear(root: Path, config_text: str) -> Replaced:
    files = demo_files(config_text)
    replaced = Replaced()
    _count_old(root / files[1], replaced)
    for name in files:
        path = root / name
        if path.is_file() or path.is_symlink():
            path.unlink()
            replaced.removed.append(name)
    for folder in ("data", "broker"):
        path = root / folder
        if path.is_dir() and not any(path.iterdir()):
            path.rmdir()
    mine = {MARKER, "data", "broker"} | {name.split("/")[0] for name in files}
    replaced.kept = sorted(p.name for p in root.iterdir() if p.name not in mine)
    replaced.kept += sorted(
        f"{folder}/{p.name}"
        for folder in ("data", "broker")
        if (root / folder).is_dir()
        for p in (root / folder).iterdir()
    )
    return replaced


def _count_old(db: Path, into: Replaced) -> None:
    """Read what the earlier run's database holds; an unreadable one counts as empty."""
    if not db.is_file():
        return
    try:
        conn = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
    except sqlite3.Error:
        return
    try:
        into.alerts, into.acknowledged = conn.execute(
            "SELECT count(*), count(acknowledged_at) FROM alerts"
        ).fetchone()
        (into.refits,) = conn.execute("SELECT count(*) FROM baselines WHERE version > 1").fetchone()
    except sqlite3.Error:
        pass
    finally:
        conn.close()
