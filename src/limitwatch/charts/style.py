"""Our own quiet palette and matplotlib settings, shared by the drawing modules."""

from __future__ import annotations

from typing import Any

# Our own quiet palette: slate for the process, clay for limits, sage/straw/blush for zones.
INK = "#26323c"
MUTED = "#7b8690"
READING = "#2f5573"
LEARNING = "#a3acb4"
LEARNING_BAND = "#f2f3f4"
CENTER = "#34454f"
LIMIT = "#a0522d"
ZONE_C = "#ecf2ee"
ZONE_B = "#f5f0e1"
ZONE_A = "#f7e6df"
INCIDENT = "#6b4c8a"
SILENCE = "#9aa4ad"
FLAG = "#c2412d"
CHANGE = "#6d5f8c"

_STYLE: dict[str, Any] = {
    "font.family": "DejaVu Sans",
    "font.size": 9.0,
    "svg.fonttype": "none",  # keep text as text in SVG (searchable, selectable)
    "axes.edgecolor": "#b8bec4",
    "axes.linewidth": 0.8,
    "axes.labelcolor": INK,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "text.color": INK,
}
