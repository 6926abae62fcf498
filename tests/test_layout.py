"""The code's layout keeps its promises: every command has help text and a test, and no module
of limitwatch imports itself back through others (an import circle makes the import order decide
what works, and was how the command modules used to register themselves)."""

from __future__ import annotations

import ast
import re
from collections.abc import Iterator
from pathlib import Path

import click
import pytest

import limitwatch
from limitwatch.cli import COMMANDS, main

SRC = Path(limitwatch.__file__).parent
TESTS = Path(__file__).parent
SHARED_CLI = {"limitwatch.cli.options"}
"""The one cli module the command modules may import."""


def module_name(path: Path) -> str:
    parts = path.relative_to(SRC.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


MODULES = {module_name(p): p for p in SRC.rglob("*.py")}


def _type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _module_level(body: list[ast.stmt]) -> Iterator[ast.Import | ast.ImportFrom]:
    """Imports that run when the module is imported: not those inside functions (a deliberate
    late import) and not those under ``if TYPE_CHECKING``."""
    for node in body:
        if isinstance(node, ast.Import | ast.ImportFrom):
            yield node
        elif isinstance(node, ast.If) and not _type_checking(node):
            yield from _module_level(node.body)
            yield from _module_level(node.orelse)
        elif isinstance(node, ast.Try):
            for block in (node.body, node.orelse, node.finalbody, *(h.body for h in node.handlers)):
                yield from _module_level(block)


def imports_of(name: str) -> set[str]:
    """The limitwatch modules ``name`` imports when it is imported."""
    tree = ast.parse(MODULES[name].read_text(encoding="utf-8"))
    package = name if MODULES[name].name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()
    for node in _module_level(tree.body):
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        else:
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            # "from package import module" imports the module; "from module import name" not.
            targets = [
                f"{base}.{alias.name}" if f"{base}.{alias.name}" in MODULES else base
                for alias in node.names
            ]
        found.update(t for t in targets if t in MODULES and t != name)
    return found


GRAPH = {name: imports_of(name) for name in MODULES}


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def test_the_cycle_finder_finds_a_circle_and_passes_a_chain() -> None:
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]
    assert cycles({"a": {"b"}, "b": {"c"}, "c": set()}) == []


def test_the_import_graph_sees_the_imports_it_must() -> None:
    # If the graph were empty, the acyclic test below would pass for nothing.
    assert "limitwatch.cli.options" in GRAPH["limitwatch.cli.incidents"]
    assert "limitwatch.store" in GRAPH["limitwatch.alerts.lifecycle"]
    assert "limitwatch.cli.baseline" in GRAPH["limitwatch.cli"]


def test_no_limitwatch_module_imports_itself_back() -> None:
    assert cycles(GRAPH) == []


def test_command_modules_import_no_other_command_module() -> None:
    commands = {m for m in MODULES if m.startswith("limitwatch.cli.")} - SHARED_CLI
    crossing = {m: sorted(GRAPH[m] & commands) for m in sorted(commands) if GRAPH[m] & commands}
    assert crossing == {}
    # and nothing outside the cli package leans on it
    users = sorted(
        m
        for m in MODULES
        if not m.startswith("limitwatch.cli")
        and any(t.startswith("limitwatch.cli") for t in GRAPH[m])
    )
    assert users == ["limitwatch.__main__"]


def _walk(
    command: click.Command, path: tuple[str, ...]
) -> Iterator[tuple[tuple[str, ...], click.Command]]:
    yield path, command
    if isinstance(command, click.Group):
        for name, sub in sorted(command.commands.items()):
            yield from _walk(sub, (*path, name))


EVERY_COMMAND = [(p, c) for p, c in _walk(main, ()) if p]
TEST_TEXT = "\n".join(
    p.read_text(encoding="utf-8") for p in TESTS.glob("test_*.py") if p.name != Path(__file__).name
)


def test_the_command_list_is_what_limitwatch_offers() -> None:
    assert sorted(c.name or "" for c in COMMANDS) == sorted(main.commands)
    assert len(EVERY_COMMAND) >= 20  # 17 commands and the baseline group's 4


@pytest.mark.parametrize("path,command", EVERY_COMMAND, ids=[" ".join(p) for p, _ in EVERY_COMMAND])
def test_every_command_has_help_text(path: tuple[str, ...], command: click.Command) -> None:
    assert (command.help or "").strip(), f"limitwatch {' '.join(path)} has no help text"
    assert command.get_short_help_str().strip()
    silent = [
        param.opts[0]
        for param in command.params
        if isinstance(param, click.Option) and not param.hidden and not (param.help or "").strip()
    ]
    assert silent == [], f"limitwatch {' '.join(path)}: options without help text"


@pytest.mark.parametrize("path,command", EVERY_COMMAND, ids=[" ".join(p) for p, _ in EVERY_COMMAND])
def test_every_command_is_run_by_some_test(path: tuple[str, ...], command: click.Command) -> None:
    words = r"""["']\s*,\s*["']""".join(re.escape(w) for w in path)
    called = re.compile(r"""["']""" + words + r"""["']""")
    assert called.search(TEST_TEXT), f"no test runs limitwatch {' '.join(path)}"
