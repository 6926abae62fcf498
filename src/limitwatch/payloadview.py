"""Showing a stored raw payload to a person without letting it act on their terminal.

A dead letter keeps what arrived, byte for byte, and what arrived may be anything: text with
control characters (an escape sequence would recolour or clear the terminal of whoever lists
it), binary, or megabytes. So text is shown with every unprintable character escaped as in a
Python string literal (:func:`limitwatch.textout.printable`, the one escaper of human
output; a backslash is doubled, so the text reads back to exactly what arrived), bytes that
are not UTF-8 are shown as hex (tables) or base64 (JSON), and a long payload is cut, always
with its full size beside it.

>>> view_payload(b"plant/line-1/temp\\n\\x1b[2J{\\"v\\": 1}").text
'plant/line-1/temp\\\\n\\\\x1b[2J{"v": 1}'
>>> v = view_payload(bytes([0xFF, 0x00, 0x41]))
>>> v.encoding, v.text, v.size
('hex', 'ff0041', 3)
>>> view_payload(b"x" * 1000, limit=10).cut
True
"""

from __future__ import annotations

import base64
from dataclasses import dataclass
from typing import Any, Literal

from limitwatch.textout import printable


@dataclass(frozen=True, slots=True)
class PayloadView:
    encoding: Literal["text", "hex", "base64"]
    text: str
    """The shown part: escaped text, hex or base64 of at most ``limit`` bytes."""
    size: int
    """The whole payload's size in bytes."""
    cut: bool

    def one_line(self) -> str:
        """For a terminal: the shown part with its size, and 'hex:' for bytes."""
        shown = self.text if self.encoding == "text" else f"{self.encoding}:{self.text}"
        more = f" … ({self.size} bytes in all)" if self.cut else ""
        return shown + more

    def to_json(self) -> dict[str, Any]:
        return {"encoding": self.encoding, "data": self.text, "size": self.size, "cut": self.cut}


def view_payload(
    raw: bytes | str | None, *, limit: int = 256, binary: Literal["hex", "base64"] = "hex"
) -> PayloadView:
    """At most ``limit`` bytes of ``raw``, shown safely (see the module docstring)."""
    if raw is None:
        return PayloadView("text", "", 0, False)
    data = raw.encode() if isinstance(raw, str) else bytes(raw)
    size = len(data)
    head = data[:limit]
    cut = size > limit
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError as exc:
        # a cut may land inside a character: only the last few bytes may be incomplete
        if cut and exc.start >= len(head) - 3 and exc.reason == "unexpected end of data":
            text = head[: exc.start].decode("utf-8", errors="strict")
        else:
            shown = head.hex() if binary == "hex" else base64.b64encode(head).decode("ascii")
            return PayloadView(binary, shown, size, cut)
    # a payload is shown once, never escaped again: backslashes are doubled first, so that
    # a payload holding the characters \x1b is told apart from one holding an ESC
    return PayloadView("text", printable(text.replace("\\", "\\\\")), size, cut)
