"""Tables follow the terminal: its width on a real terminal (a pseudo-terminal here), $COLUMNS
when set, and no cutting at all when the output goes to a pipe or a file. The least important
column is shortened first; replay never cuts its time column."""

from __future__ import annotations

import fcntl
import os
import pty
import struct
import subprocess
import termios

from tests.helpers import CLI, run_cli, write_csv

STREAM = "compressor-hall-b/aftercooler-discharge-temperature"


def plant_csv(tmp_path):
    rows = [[f"2027-01-01T00:{i:02d}:00Z", STREAM, 10 + (i % 3) * 0.5] for i in range(30)]
    rows.append(["2027-01-01T00:30:00Z", STREAM, 30.0])  # beyond the limits
    return write_csv(tmp_path / "p.csv", ["time", "stream", "v"], rows)


def replay_args(path) -> list[str]:
    return ["replay", str(path), "--value", "v", "--time", "time", "--stream", "stream",
            "--baseline-first", "20", "--rules", "limits"]


def signal_line(text: str) -> str:
    return next(line for line in text.splitlines() if "00:30:00Z" in line)


def test_output_to_a_pipe_is_never_cut(tmp_path):
    result = run_cli(*replay_args(plant_csv(tmp_path)), columns=None)
    assert result.returncode == 0, result.stderr
    line = signal_line(result.stdout)
    assert STREAM in line and "2027-01-01T00:30:00Z" in line and "…" not in line
    assert len(line) > 80


def test_a_narrow_columns_setting_shortens_the_stream_name_never_the_time(tmp_path):
    result = run_cli(*replay_args(plant_csv(tmp_path)), columns=70)
    line = signal_line(result.stdout)
    assert len(line) <= 70
    assert "2027-01-01T00:30:00Z" in line and "…" in line.split()[0]


def test_a_real_terminal_sets_the_width(tmp_path):
    path = plant_csv(tmp_path)
    main, child = pty.openpty()
    fcntl.ioctl(child, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 72, 0, 0))
    env = {k: v for k, v in os.environ.items() if k not in ("COLUMNS", "LINES")}
    process = subprocess.Popen(
        [str(CLI), *replay_args(path)], stdout=child, stderr=subprocess.DEVNULL, env=env
    )
    os.close(child)
    chunks = []
    while True:
        try:
            data = os.read(main, 4096)
        except OSError:  # the terminal's other side closed
            break
        if not data:
            break
        chunks.append(data)
    os.close(main)
    assert process.wait(timeout=60) == 0
    text = b"".join(chunks).decode().replace("\r\n", "\n")
    line = signal_line(text)
    assert len(line) <= 72 and "2027-01-01T00:30:00Z" in line and "…" in line.split()[0]
