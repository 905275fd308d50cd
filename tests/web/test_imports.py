"""The web modules import one another one way only: no circle, each importable alone.

The graph is read from the source with ``ast`` (every import, at module level or inside a
function, counts: a deferred import is still a circle); a cycle is looked for with a depth-
first search (the textbook three-colour search, from memory). Each route module is then
imported alone in a fresh interpreter, as a worker process or a tool would.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
WEB = ROOT / "service" / "web"


def _module_name(path: Path) -> str:
    return ".".join(path.relative_to(ROOT).with_suffix("").parts)


def _imports(path: Path, modules: set[str]) -> set[str]:
    """The ``service.web`` modules ``path`` imports anywhere in its body."""
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import):
            names = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names = [node.module] + [f"{node.module}.{alias.name}" for alias in node.names]
        else:
            continue
        found.update(name for name in names if name in modules)
    return found


def import_graph() -> dict[str, set[str]]:
    paths = [p for p in WEB.glob("*.py") if p.name != "__init__.py"]
    modules = {_module_name(p) for p in paths}
    return {_module_name(p): _imports(p, modules) - {_module_name(p)} for p in paths}


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    white, grey, black = 0, 1, 2
    colour = dict.fromkeys(graph, white)
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        colour[node] = grey
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if colour.get(nxt) == grey:
                return stack[stack.index(nxt):] + [nxt]
            if colour.get(nxt) == white:
                cycle = visit(nxt)
                if cycle:
                    return cycle
        colour[node] = black
        stack.pop()
        return None

    for start in sorted(graph):
        if colour[start] == white:
            cycle = visit(start)
            if cycle:
                return cycle
    return None


def test_the_search_finds_a_known_circle():
    # The circle the web modules once formed, as a graph of its own.
    circle = {"api": {"deps"}, "deps": {"auth"}, "auth": {"pages"}, "pages": {"api"}}
    assert find_cycle(circle) == ["api", "deps", "auth", "pages", "api"]
    assert find_cycle({"api": {"deps"}, "deps": set(), "pages": {"api", "deps"}}) is None


def test_web_modules_form_no_import_circle():
    graph = import_graph()
    assert {"service.web.api", "service.web.auth", "service.web.deps", "service.web.pages"} <= set(graph)
    assert find_cycle(graph) is None, " -> ".join(find_cycle(graph) or [])
    # credentials and templating are leaves of the route modules: they import no route module.
    routes = {"service.web.api", "service.web.auth", "service.web.pages", "service.web.deps"}
    assert not graph["service.web.credentials"] & routes
    assert not graph["service.web.templating"] & routes


def test_each_route_module_imports_alone_in_a_fresh_interpreter():
    names = ["api", "auth", "deps", "pages"]
    runs = [subprocess.Popen([sys.executable, "-c", f"import service.web.{name}"], cwd=ROOT,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for name in names]
    for name, run in zip(names, runs):
        _, err = run.communicate(timeout=120)
        assert run.returncode == 0, f"service.web.{name}: {err[-800:]}"
