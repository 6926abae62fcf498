"""The one number parser: a reading's value and sequence number, by the same rules wherever
they come from (MQTT payloads, file rows, the offline commands).

A value is a JSON number or a plain decimal text (:data:`~limitwatch.ingest.timeparse.
PLAIN_DECIMAL`: no ``1_000``, no hexadecimal, which Python's ``float`` would read); NaN and the
infinities are refused by name as ``not-finite``, and so is a number too large for a float. A
sequence number is a whole number from 0 to :data:`MAX_SEQ`.

References
----------
IETF RFC 8259 (2017), *The JavaScript Object Notation (JSON) Data Interchange Format*,
section 6: NaN and Infinity are not JSON numbers (Python's ``json`` reads them anyway; they are
refused here as not finite).
"""

from __future__ import annotations

import math
import re
from typing import Any

from limitwatch.ingest.reasons import PayloadError, show
from limitwatch.ingest.timeparse import PLAIN_DECIMAL

__all__ = ["MAX_SEQ", "parse_decimal", "parse_seq", "parse_value"]

MAX_SEQ = 2**63 - 1
"""Largest sequence number SQLite stores as an INTEGER."""

_NON_FINITE = re.compile(r"[+-]?(?:nan|inf|infinity)", re.IGNORECASE)
_DIGITS = re.compile(r"\+?0*(\d{1,19})")
"""A whole number in text; the group holds its significant digits (at most 19: ``MAX_SEQ`` has
19, and ``int()`` of a longer text is work for nothing, refused past 4,300 digits besides)."""


def parse_decimal(raw: str, what: str) -> float:
    """A plain decimal text (white space around it allowed) as a finite float."""
    text = raw.strip()
    if PLAIN_DECIMAL.fullmatch(text):
        number = float(text)
        if not math.isfinite(number):
            raise PayloadError("not-finite", f"{what} {show(raw)} is too large for a number")
        return number
    if _NON_FINITE.fullmatch(text):
        raise PayloadError("not-finite", f"{what} {show(raw)} is not a finite number")
    if not text:
        raise PayloadError("not-a-number", f"{what} is empty")
    raise PayloadError("not-a-number", f"{what} {show(raw)} is not a decimal number")


def parse_value(raw: Any, what: str) -> float:
    """A reading's value by the service's rules; the offline commands (``baseline fit``,
    ``replay``) use it too, so that a file they accept is one the service accepts.

    >>> parse_value(" 10.5 ", "value"), parse_value(7, "value")
    (10.5, 7.0)
    >>> parse_value("1_05", "value")
    Traceback (most recent call last):
    ...
    limitwatch.ingest.reasons.PayloadError: not-a-number: value '1_05' is not a decimal number
    """
    if isinstance(raw, bool) or raw is None or isinstance(raw, dict | list):
        raise PayloadError("not-a-number", f"{what} {show(raw)} is not a number")
    if isinstance(raw, int):
        try:
            number = float(raw)
        except OverflowError:
            raise PayloadError("not-finite", f"{what} {show(raw)} is too large") from None
    elif isinstance(raw, float):
        number = raw
    elif isinstance(raw, str):
        return parse_decimal(raw, what)
    else:
        raise PayloadError("not-a-number", f"{what} {show(raw)} is not a number")
    if not math.isfinite(number):
        raise PayloadError("not-finite", f"{what} {show(raw)} is not a finite number")
    return number


def parse_seq(raw: Any, what: str) -> int:
    """A sequence number: a whole number (or a text holding one) from 0 to :data:`MAX_SEQ`."""
    number: int | None = None
    if isinstance(raw, bool) or raw is None:
        number = None
    elif isinstance(raw, int):
        number = raw
    elif isinstance(raw, float) and math.isfinite(raw) and raw.is_integer():
        number = int(raw)
    elif isinstance(raw, str) and (digits := _DIGITS.fullmatch(raw.strip())) is not None:
        number = int(digits.group(1))
    if number is None or not 0 <= number <= MAX_SEQ:
        raise PayloadError(
            "bad-seq", f"{what} {show(raw)} is not a whole number from 0 to {MAX_SEQ}"
        )
    return number
