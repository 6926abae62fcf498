"""Ending a child process we started (a private broker, a test server, a worker).

Why one helper: a child asked to stop (SIGTERM) usually writes its state and leaves; one that
hangs must still go (SIGKILL) so that nothing it holds -- a port, a file lock -- outlives the
caller. Every place that starts a child ends it this same way.
"""

from __future__ import annotations

import subprocess

__all__ = ["end_process"]


def end_process(process: subprocess.Popen[bytes], grace_s: float = 10.0) -> None:
    """Ask ``process`` to stop, give it ``grace_s`` seconds, then kill it and reap it.

    A process that has already exited is only reaped."""
    if process.poll() is not None:
        return
    process.terminate()
    try:
        process.wait(timeout=grace_s)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait(timeout=grace_s)
