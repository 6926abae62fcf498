"""What a stream id may be, checked where ids enter: topic templates, file columns, config.

A stream id is a key in every table, a label on every chart and alert, and part of log lines
and notification texts. One id that cannot be stored (a lone surrogate is not UTF-8 text and
fails the database's encoding) or that rewrites a log line (a newline, a terminal escape)
would fail a whole batch, or mislead the person reading about it; one 60 KB id (a topic's
``{#}``) would be kept in memory and in every row. So an id must be text of at most
:data:`MAX_STREAM_ID` characters, valid as UTF-8 (no lone surrogates), without control
characters (C0, DEL and C1).

>>> stream_id_problem("pack-1/downtime") is None
True
>>> stream_id_problem("line-1\\nok")
'contains the control character U+000A; stream ids are plain text on one line'
>>> stream_id_problem("s\\ud800")
'contains a lone surrogate U+D800, which is not UTF-8 text'

References
----------
The Unicode Standard, section 3.9 (a surrogate code point on its own is not a Unicode scalar
value and has no UTF-8 form); IETF RFC 3629 (2003), section 3; ISO/IEC 6429 (the C0 and C1
control characters).
"""

from __future__ import annotations

import re

__all__ = ["MAX_STREAM_ID", "stream_id_problem"]

MAX_STREAM_ID = 256
"""Most characters in a stream id: room for a site/area/line/machine/sensor path, far below
what an MQTT topic may hold (65535 bytes)."""

_UNWANTED = re.compile(r"[\x00-\x1f\x7f-\x9f\ud800-\udfff]")


def stream_id_problem(stream: str) -> str | None:
    """Why ``stream`` cannot be a stream id (a phrase to follow the id), or None when it can."""
    if len(stream) > MAX_STREAM_ID:
        return f"is {len(stream)} characters long; a stream id has at most {MAX_STREAM_ID}"
    found = _UNWANTED.search(stream)
    if found is None:
        return None
    code = ord(found.group())
    if 0xD800 <= code <= 0xDFFF:
        return f"contains a lone surrogate U+{code:04X}, which is not UTF-8 text"
    return (
        f"contains the control character U+{code:04X}; stream ids are plain text on one line"
    )
