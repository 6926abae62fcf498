"""The one contract every source keeps, built-in or third-party.

A source turns outside data into :class:`~limitwatch.model.Reading` s and says when the data it
gave has been used. The service's worker owns everything that is the same for every source:
batching, the transaction, the stream cap, the reorder window, catching a parser's bug as a
dead letter, health and metrics. So a source only:

* **starts** with the service's intake queue (:meth:`Source.start`): a source that is pushed
  to (a broker connection) puts each item there from its own thread or process; each item has
  a ``source`` attribute (the source's name) and a ``received_at`` time (the wall clock where
  it arrived). A source that is asked (files) sets ``poll_every`` and yields items from
  :meth:`Source.poll` instead, on the worker's thread;
* **parses** one item (:meth:`Source.parse`) into a :class:`Parsed`: a reading, or a refusal
  with a reason code and what it found (a dead letter); or None for an item that only moves
  the source's position on (a CSV header, a blank line);
* **acknowledges** what was committed (:meth:`Source.acknowledge`), in arrival order, only
  after the transaction holding its effect has committed. What says "this input was used"
  either happens there (an MQTT acknowledgement) or is a position committed inside the
  batch's transaction (:meth:`Source.positions`: file offsets), so a crash at any point loses
  nothing;
* reports its **health** (:meth:`Source.health`) and **closes**.

A source that hands the worker only some streams (a Kafka consumer-group member owns the
streams of its partitions; set :attr:`Source.partial`) also gets a :class:`StreamKeeper` in
its context, to take streams on and give them up on the worker's thread, and three hooks:
:meth:`Source.within` does its part of each batch's transaction (the partition offsets, fenced
by owner and generation), :meth:`Source.fenced` hears that a batch was refused because a
partition was taken over, :meth:`Source.stale_allowed` holds stale checks back while the
source is not settled (just assigned, or behind), and :meth:`Source.looks_after` says which
streams' incidents this worker's alert tick reminds, escalates and announces.

Sources are found by type name in the ``limitwatch.sources`` entry-point group
(:mod:`limitwatch.ingest.registry`) and built from their validated settings
(:meth:`Source.from_settings`); their settings model derives from
:class:`~limitwatch.config.SourceSettings`.

>>> from typing import Literal
>>> class CountSettings(SourceSettings):
...     type: Literal["count"] = "count"
>>> class CountSource(Source):
...     Settings = CountSettings
...     @classmethod
...     def from_settings(cls, settings, context):
...         return cls(settings)
...     def parse(self, item, received_at):
...         return Parsed(self.name, item.raw, reading=Reading("n", received_at, float(item.raw)))
...     def acknowledge(self, items):
...         self.done = len(items)
>>> source = CountSource.from_settings(CountSettings(name="counter"), SourceContext())
>>> source.parse(Item("counter", b"3", 10.0), 10.0).reading
Reading(stream='n', time=10.0, value=3.0, seq=None)

References
----------
APScheduler 3.x and datasette plugin designs (as described in the project's style notes): one
abstract base per kind of plugin, few abstract methods, ``start()``/``close()`` hooks, plugins
found through an entry-point group.
"""

from __future__ import annotations

import queue
from abc import ABC, abstractmethod
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ClassVar, NamedTuple, Protocol, Self

from limitwatch.config import SourceSettings
from limitwatch.model import Reading

__all__ = [
    "Item",
    "Parsed",
    "Source",
    "SourceContext",
    "SourceHealth",
    "SourceSettings",
    "StreamKeeper",
]


@dataclass(frozen=True, slots=True)
class Parsed:
    """One intake item after parsing: a reading, or the reason it has none."""

    source: str
    raw: bytes
    """What a dead letter keeps of the item (an MQTT message as topic, newline, payload)."""
    reading: Reading | None = None
    error: str | None = None
    """The dead letter's reason code when there is no reading."""
    detail: str = ""
    position: tuple[str, int] | None = None
    """Where the source stands once this item is used (for a file line: file identity and
    the offset after the line), committed with the item when a batch is applied one item at
    a time."""
    offline: tuple[str, ...] = ()
    """Streams whose sender said it went offline (a Sparkplug death): the worker opens their
    stale incidents in the batch that commits this item, with ``detail`` as the words why,
    instead of waiting for the stale check. A reading of the stream later in the same batch
    cancels it. Not a dead letter: ``reading`` and ``error`` stay None."""
    origin: Any = None
    """The source's own note of where the item came from, handed back to
    :meth:`Source.within` (a Kafka partition and offset); the worker never reads it."""


class Item(NamedTuple):
    """A plain intake item for sources that need nothing more: raw bytes and when they came."""

    source: str
    raw: bytes
    received_at: float


@dataclass(frozen=True, slots=True)
class SourceContext:
    """What the service gives a source when building it."""

    future_tolerance: float | None = None
    """``[service] future_tolerance``: refuse readings stamped later than receipt plus this."""
    positions: Mapping[str, int] = field(default_factory=dict)
    """The positions this source last committed (see :meth:`Source.positions`)."""
    state_file: Path | None = None
    """A file of its own beside the database, for what a source must remember across
    restarts besides positions (the Sparkplug source's births); None: nowhere."""
    keeper: StreamKeeper | None = None
    """The worker's streams, for a :attr:`Source.partial` source; None in tools and tests
    that run no worker."""


class StreamKeeper(Protocol):
    """What the worker lends a source that holds only some streams (see
    :attr:`Source.partial`). Everything but :meth:`on_worker` must be called on the worker's
    thread, i.e. from inside a function given to :meth:`on_worker` or from a hook the worker
    calls."""

    @property
    def store(self) -> Any:
        """The worker's store connection (for ownership rows)."""

    def now(self) -> float:
        """The service's time."""

    def on_worker(self, task: Any) -> None:
        """Run ``task()`` on the worker's thread after the batch it is working on has
        committed, and wait for it; from any thread. Run at once when the worker has
        stopped."""

    def take_on(self, streams: Any) -> int:
        """Build the monitors of ``streams`` from their checkpoints and the readings committed
        after them (streams never seen are left to their first reading); return how many."""

    def give_up(self, streams: Any, within: Any = None) -> int:
        """Forget the monitors of ``streams``; return how many were held. With ``within``,
        first write the checkpoints of those that changed, with ``within()`` in the same
        transaction (it may raise a fence error: then nothing is written, and the monitors
        are forgotten all the same)."""

    def held(self) -> Any:
        """The streams whose monitors the worker holds now."""


@dataclass(frozen=True, slots=True)
class SourceHealth:
    """A source's state for ``/health`` and ``/metrics``."""

    connected: bool | None = None
    """None for a source without a connection (it never makes ``/health`` degraded)."""
    ready: bool = True
    """Taking input: connected and its subscriptions granted (a demo or test waits for it)."""
    last_error: str | None = None
    restarts: int = 0
    """How often its connection process died and was started again."""
    detail: Mapping[str, Any] = field(default_factory=dict)
    """Anything else worth showing under the source's name in ``/health``."""


class Source(ABC):
    """One configured input. Subclasses set ``Settings`` and implement :meth:`from_settings`,
    :meth:`parse` and :meth:`acknowledge`; the other methods have working defaults.

    Everything but :meth:`start` and :meth:`close` is called on the worker's thread only.
    Nothing a source is given may make :meth:`parse` raise on purpose: bad input is a
    :class:`Parsed` with an ``error``. (A bug that raises anyway becomes a ``parse-error``
    dead letter; the worker goes on.)
    """

    Settings: ClassVar[type[SourceSettings]]

    poll_every: float | None = None
    """Seconds between polls for a source that is asked rather than pushed to."""
    poll_job: str = "poll"
    """The name of its poll job in ``/health`` (``poll-files:<source>``)."""
    reorder_within: float | None = None
    """Hold its readings this long and apply each stream's in order (see
    :mod:`limitwatch.ingest.reorder`); acknowledgements still go in arrival order."""
    connection: ClassVar[bool] = False
    """True for a source with a connection whose state ``/health`` and ``/metrics`` show."""
    partial: ClassVar[bool] = False
    """True for a source that hands this worker only some streams, others going to other
    workers on the same store (Kafka partitions): the worker then restores no monitor at
    start, rebuilds a stream's monitor from the store before its first reading, shares the
    store with other such workers, and lets the source take streams on and give them up
    through ``context.keeper``. Such a source must be the service's only source."""

    def __init__(self, settings: SourceSettings) -> None:
        self.settings = settings
        self.name = settings.name

    @classmethod
    @abstractmethod
    def from_settings(cls, settings: Any, context: SourceContext) -> Self:
        """Build the source from its validated settings, reading its secrets now (fail early,
        before anything is consumed)."""

    def start(self, intake: queue.SimpleQueue[Any]) -> None:  # noqa: B027 -- optional hook
        """Begin putting items on ``intake`` (pushed sources); called once."""

    def poll(self) -> Iterable[Any]:
        """New items of a polled source, in order; read lazily, so the worker can commit a
        long backlog in several batches."""
        return ()

    @abstractmethod
    def parse(self, item: Any, received_at: float) -> Parsed | Sequence[Parsed] | None:
        """The reading in ``item``, a refusal, or None for an item that only moves the
        position on; a sequence of them for an item that holds several readings (a Sparkplug
        message carries many metrics). All of them are committed in one batch, and the item
        is acknowledged once every reading of it held by a reorder window is committed.
        ``received_at`` is the service's time of receipt (never behind the last
        one given out, whatever the wall clock did)."""

    def refused(self, item: Any, reason: str, detail: str) -> Parsed:
        """``item`` as a dead letter with ``reason``: for the refusals the worker makes (the
        stream cap, a parser's bug). Override to keep more of the item or say where it was."""
        return Parsed(self.name, bytes(getattr(item, "raw", b"")), error=reason, detail=detail)

    def positions(self, items: Sequence[Any]) -> dict[str, int]:
        """Positions to commit in the same transaction as ``items`` (those of one batch, in
        order): key -> offset, kept per source by the store. Default: none."""
        return {}

    @abstractmethod
    def acknowledge(self, items: Sequence[Any]) -> None:
        """``items`` (in arrival order) are committed: tell the sender, or move on."""

    def within(self, store: Any, parsed: Sequence[Parsed]) -> None:  # noqa: B027 -- optional
        """Work of this source inside the transaction that commits ``parsed`` (its items of a
        batch, in order, or one of them when a batch is applied an item at a time): a
        position that must be durable with them and checked against another writer (a Kafka
        partition's next offset, fenced by owner and generation). Raise the store's
        ``Fenced`` to roll the whole transaction back. Default: nothing."""

    def fenced(self, error: Exception) -> None:  # noqa: B027 -- optional hook
        """A batch was rolled back because :meth:`within` found ``error`` (a ``Fenced``): give
        up what it names; the worker then commits the rest of the batch without the items
        :meth:`owns` now refuses."""

    def owns(self, parsed: Parsed) -> bool:
        """False for an item this source no longer wants committed (its partition was taken
        over). Default: every item."""
        return True

    def stale_allowed(self, stream: str, now: float) -> bool:
        """May the stale check open an incident for ``stream`` now? A source that was just
        given the stream, or is behind on it, says no until it has settled. Default: yes."""
        return True

    def looks_after(self, stream: str, now: float) -> bool:
        """Is this worker the one to send the reminders, escalations and announcements of
        ``stream``'s incidents at ``now``? A source that shares streams with other workers says
        yes for the streams it owns (and has settled on), so each incident has one sender.
        Default: yes, every stream is this worker's."""
        return True

    def health(self) -> SourceHealth:
        return SourceHealth()

    def close(self) -> None:  # noqa: B027 -- optional hook, deliberately empty
        """Stop and release connections; safe after a failed start and when called twice."""

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.name!r}>"
