"""Why an input from outside is not a reading: the reason codes and the error that carries one.

Nothing that arrives from outside may stop the service. Every way a message or a file row can be
unusable raises :class:`PayloadError` with a short, stable ``reason_code`` (the dead-letter
reason, good for counting and alerting) and a message a person can act on:

==================  =======================================================================
``oversize``        the payload is larger than the source's ``max_payload_bytes``
``unmapped-topic``  no topic entry of the source matches the topic, or its template is empty
``bad-json``        the payload is not UTF-8 JSON
``missing-field``   a configured field (value, time, seq, stream) is absent, null or blank
``not-a-number``    the value is not a decimal number
``not-finite``      the value is NaN or infinite (or too large for a float)
``bad-time``        the time stamp does not fit ``time_format`` or lies outside 1970..9999
``in-the-future``   the time stamp is later than the receive time plus ``future_tolerance``
``bad-seq``         the sequence number is not a whole number from 0 to 2**63 - 1
``bad-stream``      the stream id is not usable: a file row names it with something other than
                    text or a whole number, or the id (from a topic, a row or ``stream_fixed``)
                    is too long, holds a control character or is not UTF-8 text (see
                    :mod:`limitwatch.ingest.streamid`)
==================  =======================================================================

>>> PayloadError("bad-seq", "seq field 'n' -1 is not a whole number").reason
'bad-seq'
"""

from __future__ import annotations

from typing import Any

__all__ = ["REASONS", "PayloadError", "show"]

REASONS: tuple[str, ...] = (
    "oversize",
    "unmapped-topic",
    "bad-json",
    "missing-field",
    "not-a-number",
    "not-finite",
    "bad-time",
    "in-the-future",
    "bad-seq",
    "bad-stream",
)
"""Every ``PayloadError.reason_code``, in the order the checks run."""


class PayloadError(ValueError):
    """Input that cannot become a reading; it goes to the dead letters with ``reason_code``."""

    def __init__(self, reason_code: str, message: str) -> None:
        super().__init__(f"{reason_code}: {message}")
        self.reason_code = reason_code
        self.message = message

    @property
    def reason(self) -> str:
        """Same as ``reason_code`` (the dead-letter reason)."""
        return self.reason_code


def show(value: Any, limit: int = 60) -> str:
    """``value`` as an error message quotes it: its ``repr``, cut to ``limit`` characters, and
    never an exception of its own (a message names what was wrong even when it is huge)."""
    try:
        text = repr(value)
    except (RecursionError, ValueError):  # nested past the interpreter's limit; a huge int
        return f"<a {type(value).__name__} too large to show>"
    return text if len(text) <= limit else text[: limit - 3] + "..."
