"""Cross-references between entries: unique names, and routes that name real notifiers.

Why on the raw tables: these are reported even when other keys of the same file are wrong, so
one run of ``check`` lists every problem at once.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any


def _reference_problems(data: Mapping[str, Any]) -> list[tuple[tuple[str | int, ...], str]]:
    """Unique names and route references, checked on the raw tables so they are reported even
    when other keys of the same file are wrong."""
    out: list[tuple[tuple[str | int, ...], str]] = []

    def tables(key: str) -> list[tuple[int, Mapping[str, Any]]]:
        value = data.get(key)
        if not isinstance(value, list):
            return []
        return [(i, t) for i, t in enumerate(value) if isinstance(t, Mapping)]

    def unique(section: str, key: str, what: str) -> set[str]:
        first: dict[str, int] = {}
        for i, table in tables(section):
            value = table.get(key)
            if not isinstance(value, str):
                continue
            if value in first:
                out.append(
                    (
                        (section, i, key),
                        f"{what} {value!r} is already used by {section}[{first[value]}]",
                    )
                )
            else:
                first[value] = i
        return set(first)

    unique("sources", "name", "source name")
    unique("sources", "client_id", "client id")
    notifiers = unique("notifiers", "name", "notifier name")
    routes = unique("routes", "name", "route name")
    for i, route in tables("routes"):
        name = route.get("name")
        if isinstance(name, str) and name in notifiers and name in routes:
            out.append(
                (
                    ("routes", i, "name"),
                    f"{name!r} is also a notifier's name; the outbox tells them apart by name, "
                    "so rename one",
                )
            )
    listing = ", ".join(sorted(notifiers)) or "(none)"
    for i, route in tables("routes"):
        for key in ("notifiers", "escalate_to"):
            names = route.get(key)
            if not isinstance(names, list):
                continue
            for j, name in enumerate(names):
                if isinstance(name, str) and name not in notifiers:
                    out.append(
                        (
                            (("routes", i, key, j)),
                            f"no notifier named {name!r}; notifiers: {listing}",
                        )
                    )
    return out

