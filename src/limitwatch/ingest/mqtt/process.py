"""Each MQTT connection in a process of its own, so the network client and the worker never
share one interpreter lock.

Why a process: paho-mqtt does its packet handling in Python. In one process, its network
thread and the service's worker took turns on the interpreter lock, and the service drained a
broker backlog at about 40% of the rate of a bare paho client that only counts messages. A
connection process has a core of its own for paho; the service's process keeps the worker.

What crosses between them, over two one-way pipes:

* up (connection -> service): lists of :data:`~limitwatch.ingest.mqtt.client.Arrival` tuples and
  :class:`Status` records, sent by one forwarding thread as they pile up, so a busy stream
  costs one pipe message per batch rather than per reading; the service's side makes each
  arrival a :class:`~limitwatch.ingest.mqtt.client.Delivery` and puts each message's deliveries
  on the intake as one list;
* down (service -> connection): the acknowledgements of a committed batch, in arrival order, as
  one message, which the connection hands to paho as one packet
  (:meth:`~limitwatch.ingest.mqtt.client.MqttConnection.ack_all`), and the request to close.

Nothing changes in what is promised: a message is acknowledged only after the batch holding
its effect committed (the worker decides; the connection process only carries it out), so a
crash of either process loses nothing the broker has not kept for the persistent session.

Lifetimes. The connection process exits when the service asks (after saying ``offline`` and
disconnecting), and at once, without a clean disconnect, when the service's process is gone
(its end of the down pipe closes), so a killed service never leaves a connection behind that
would fight its successor for the client id; the broker then publishes our last will. If the
connection process dies, the service logs it, reports the source down on ``/health``, and
starts a new one after the source's reconnect delay. Deliveries that came through the dead
process are not acknowledged through the new one; the broker sends them again, and the engine
refuses what it already has.
"""

from __future__ import annotations

import contextlib
import logging
import os
import queue
import signal
import subprocess
import sys
import threading
import time
from multiprocessing.connection import Connection
from typing import Any, NamedTuple

from limitwatch import LOG_FORMAT
from limitwatch.ingest.mqtt.client import Delivery, MqttConnection, MqttSettings

log = logging.getLogger("limitwatch.mqtt")

FORWARD_MAX = 1000
"""Most records in one pipe message from a connection process."""

GATHER_S = 0.002
"""How long the forwarder lets messages gather before sending what it has: a delay far below
the worker's ``batch_wait``, for a tenth of the pipe writes at high rates."""


class Status(NamedTuple):
    """A connection's state, sent up whenever it changes."""

    connected: bool
    subscribed: bool
    last_error: str | None
    connects: int
    closed: bool = False


def _status(source: MqttConnection, closed: bool = False) -> Status:
    return Status(
        source.connected.is_set(),
        source.subscribed.is_set(),
        source.last_error,
        source.connects,
        closed,
    )


# --------------------------------------------------------------------- the connection process


CHILD_MODULE = "limitwatch.ingest.mqtt.process"
"""What the connection process runs: ``python -m`` this module, with the two pipe ends' file
descriptors and ``--source NAME`` as arguments, so ``ps`` shows which process it is and for
which source. A plain new interpreter rather than ``multiprocessing``'s "spawn", which runs the
parent's main script again in the child (a benchmark script, a notebook ...)."""


def child_main() -> None:
    """Entry point of a connection process: ``argv`` holds the up pipe's write end and the
    down pipe's read end; the first message down is (settings, log level)."""
    # systemd stops a unit by signalling every process in it, and Ctrl-C in a terminal reaches
    # the whole foreground group; the service decides when this process leaves (after the last
    # acknowledgements are sent), so those signals are not for it.
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    up = Connection(int(sys.argv[1]), readable=False)
    down = Connection(int(sys.argv[2]), writable=False)
    try:
        settings, log_level = down.recv()
    except (EOFError, OSError):
        os._exit(3)
    _serve(settings, up, down, log_level)


def _serve(settings: MqttSettings, up: Connection, down: Connection, log_level: int) -> None:
    """Run one :class:`MqttConnection` until the service asks it to close or goes away."""
    logging.basicConfig(level=log_level, format=LOG_FORMAT, stream=sys.stderr)
    local: queue.SimpleQueue[Any] = queue.SimpleQueue()
    source: MqttConnection | None = None

    def changed() -> None:
        if source is not None:
            local.put(_status(source))

    source = MqttConnection(settings, local, on_change=changed)
    forwarder = threading.Thread(
        target=_forward, args=(local, up), name="limitwatch-forward", daemon=True
    )
    forwarder.start()
    source.start()
    try:
        while True:
            message = down.recv()
            if message[0] == "ack":
                source.ack_all(message[1])
            elif message[0] == "publish":
                source.publish(*message[1:])
            elif message[0] == "close":
                source.close()
                local.put(_status(source, closed=True))
                break
    except (EOFError, OSError):
        # The service is gone (killed, say). Leave at once and without a clean disconnect:
        # the broker keeps the session, publishes the last will, and the next service resumes.
        os._exit(3)
    forwarder.join(timeout=10)


def _forward(local: queue.SimpleQueue[Any], up: Connection) -> None:
    """The connection process's only sender up: batches whatever is waiting.

    Once something arrives it waits ``GATHER_S`` for more before sending, unless a full batch
    is already there: without the pause it woke for every single message while paho handed
    them over one by one, and paid a pipe write and a turn of the interpreter lock for each.
    """
    while True:
        items = [local.get()]
        if not _drain(local, items):
            time.sleep(GATHER_S)
            _drain(local, items)
        try:
            up.send(items)
        except OSError:
            os._exit(3)
        last = items[-1]
        if type(last) is Status and last.closed:
            return


def _drain(local: queue.SimpleQueue[Any], items: list[Any]) -> bool:
    """Move what is waiting into ``items``, up to ``FORWARD_MAX``; True when that filled it."""
    try:
        while len(items) < FORWARD_MAX:
            items.append(local.get_nowait())
    except queue.Empty:
        return False
    return True


# ------------------------------------------------------------------------ the service's side


class MqttProcess:
    """The service's handle on one connection process; it looks like a :class:`MqttConnection`
    to the service (``connected``, ``subscribed``, ``last_error``, ``connects``) and puts the
    deliveries it receives on ``intake``."""

    def __init__(
        self, settings: MqttSettings, intake: queue.SimpleQueue[Any], log_level: int | None = None
    ) -> None:
        self.settings = settings
        self.name = settings.name
        self.connected = threading.Event()
        self.subscribed = threading.Event()
        self.last_error: str | None = None
        self.connects = 0
        self.restarts = 0
        """How many times the connection process died and was started again."""
        self._connects_before = 0
        self._intake = intake
        self._log_level = log_level if log_level is not None else logging.getLogger().level
        self._epoch = 0
        self._closing = threading.Event()
        self._lock = threading.Lock()
        self._process: Any = None
        self._down: Connection | None = None
        self._reader: threading.Thread | None = None

    def start(self) -> None:
        with self._lock:
            self._spawn()

    def _spawn(self) -> None:
        # A new interpreter (fork + exec), not a fork of this process: the service already
        # runs threads (the outbox worker, the status server) whose locks a forked copy would
        # inherit in whatever state they were.
        self._epoch += 1
        self._connects_before = self.connects
        up_read, up_write = os.pipe()
        down_read, down_write = os.pipe()
        process = subprocess.Popen(
            [
                sys.executable,
                "-m",
                CHILD_MODULE,
                str(up_write),
                str(down_read),
                "--source",
                self.name,
            ],
            pass_fds=(up_write, down_read),
        )
        # Only the child keeps these ends, so each side sees the other's exit as end-of-file.
        os.close(up_write)
        os.close(down_read)
        down = Connection(down_write, readable=False)
        with contextlib.suppress(OSError):  # if it died at once, the reader reports it
            down.send((self.settings, self._log_level))
        self._process, self._down = process, down
        self._reader = threading.Thread(
            target=self._read,
            args=(Connection(up_read, writable=False), process, self._epoch),
            name=f"limitwatch-mqtt-{self.name}-reader",
            daemon=True,
        )
        self._reader.start()

    def _read(self, up: Connection, process: Any, epoch: int) -> None:
        """Pass each pipe message's deliveries on to the intake as one list (the worker takes
        it apart): one put and one wake-up of the worker per message instead of per delivery."""
        put, name = self._intake.put, self.name
        make = tuple.__new__  # a Delivery without a Python-level __new__ call for each
        try:
            while True:
                deliveries: list[Delivery] = []
                for item in up.recv():
                    if type(item) is tuple:  # an Arrival
                        deliveries.append(make(Delivery, (name, *item, epoch)))
                        continue
                    if deliveries:
                        put(deliveries)
                        deliveries = []
                    self._apply(item)
                    if item.closed:
                        return
                if deliveries:
                    put(deliveries)
        except (EOFError, OSError):
            pass
        finally:
            up.close()
        if not self._closing.is_set():
            self._died(process, epoch)

    def _apply(self, status: Status) -> None:
        self.last_error = status.last_error
        self.connects = self._connects_before + status.connects
        for event, on in ((self.connected, status.connected), (self.subscribed, status.subscribed)):
            if on:
                event.set()
            else:
                event.clear()

    def _died(self, process: Any, epoch: int) -> None:
        try:
            code = process.wait(timeout=5)
        except subprocess.TimeoutExpired:
            process.kill()
            code = process.wait()
        self.connected.clear()
        self.subscribed.clear()
        self.last_error = f"the connection process exited unexpectedly (exit code {code})"
        log.error(
            "mqtt %s: %s; starting a new one in %.0f s",
            self.name,
            self.last_error,
            self.settings.reconnect_min_s,
        )
        if self._closing.wait(self.settings.reconnect_min_s):
            return
        with self._lock:
            if not self._closing.is_set() and epoch == self._epoch:
                self.restarts += 1
                self._spawn()

    def ack(self, deliveries: list[Delivery]) -> None:
        """Acknowledge committed deliveries, in arrival order, through the connection process
        that received them; those from an earlier process are left for the broker to resend."""
        epoch = self._epoch
        acks = [(d.mid, d.qos) for d in deliveries if d.epoch == epoch and d.qos > 0]
        if not acks or self._down is None:
            return
        try:
            self._down.send(("ack", acks))
        except (BrokenPipeError, OSError):
            log.warning(
                "mqtt %s: could not pass on %d acknowledgements (the connection process is "
                "gone); the broker will send those messages again",
                self.name,
                len(acks),
            )

    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False) -> bool:
        """Have the connection process publish a message; False when it is gone (the caller
        may ask again later)."""
        if self._down is None:
            return False
        try:
            self._down.send(("publish", topic, payload, qos, retain))
        except (BrokenPipeError, OSError):
            return False
        return True

    def close(self, timeout: float = 15.0) -> None:
        """Ask the connection process to say ``offline`` and disconnect; wait for it to end."""
        self._closing.set()
        with self._lock:
            process, down = self._process, self._down
        if process is None or down is None:
            return
        with contextlib.suppress(OSError):  # already gone
            down.send(("close",))
        try:
            process.wait(timeout)
        except subprocess.TimeoutExpired:
            log.warning(
                "mqtt %s: the connection process did not close in time; ending it", self.name
            )
            process.kill()
            process.wait(5)
        down.close()
        if self._reader is not None:
            self._reader.join(timeout=5)


if __name__ == "__main__":
    # Run the module under its own name: what the process pickles up the pipe must name
    # limitwatch.ingest.mqtt.process, not __main__, for the service to read it.
    from limitwatch.ingest.mqtt.process import child_main as _child_main

    _child_main()
