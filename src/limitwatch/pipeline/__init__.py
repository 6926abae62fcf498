"""Evaluate a batch of readings and commit everything it caused in one transaction.

The pipeline is the only writer of stream state. For a batch it runs each reading through its
stream's :class:`~limitwatch.engine.StreamMonitor`, then in ONE SQLite transaction stores the
accepted readings, the refused ones as dead letters, any baseline the learning phase fitted, the
alert changes and the notifications they owe (outbox rows), the checkpoints that are due, and the
file offsets of the lines it used. Only after that commit does the caller acknowledge the broker
or move a file offset in memory.

Checkpoints and the readings table together are the stream state. The accepted readings of every
batch are committed with it, in the order the engine saw them, so a monitor's state is always its
last checkpoint plus the readings committed after it. A checkpoint is therefore written when a
stream first appears, when it fits a baseline, at most every ``checkpoint_every`` seconds while
it changes, before old readings are pruned, and for every stream at a clean stop -- not with
every batch: serialising each touched stream's whole state was most of a batch's cost, and most
of what it wrote to disk. After a crash, :meth:`Pipeline.restore` applies the readings committed
after each checkpoint again (the engine is deterministic), so the monitors stand exactly where
the last commit left them.

One bad reading must never stop monitoring, and with at-least-once delivery a reading that
stops the service comes back after every restart. So no reading's failure leaves
:meth:`Pipeline.process` as an exception. If the engine raises for a reading, or the batch's
commit fails for a reason that is not the store's own (the database refuses one row, say), the
batch is rolled back, the monitors it touched are rebuilt from the store (checkpoint plus the
readings committed after it, as a restart does), and its items are applied again one
transaction each; the one that fails again becomes a dead letter (``engine-error`` or
``store-refused``) and the rest are kept. The monitors therefore always equal what is
committed, and the caller acknowledges only after :meth:`Pipeline.process` returns, in
arrival order, as before.

A failure of the store itself (an I/O error, a full disk, a locked or damaged database: any
``sqlite3.OperationalError`` or ``DatabaseError`` other than a refused row) leaves the monitors
ahead of the database; the pipeline then refuses to go on (:class:`PipelineBroken`) and the
service exits, so a restart resumes from the last commit and the broker redelivers what was
never acknowledged.
"""

from __future__ import annotations

from limitwatch.ingest.base import Parsed
from limitwatch.pipeline.batch import Pipeline
from limitwatch.pipeline.failures import PipelineBroken, failure_words, store_failed
from limitwatch.pipeline.state import CHECKPOINT_EVERY_S, BatchResult

__all__ = [
    "CHECKPOINT_EVERY_S",
    "BatchResult",
    "Parsed",
    "Pipeline",
    "PipelineBroken",
    "failure_words",
    "store_failed",
]
