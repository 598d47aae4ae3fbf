"""Layering as a test: every import between our packages obeys the rules of
DEVELOPERS.md ("Dependencies point one way"), and our own modules import each other
without cycles.

The imports are read with `ast` from the source, every one of them: at module top,
inside functions (deferred imports are still edges), relative imports resolved, and
our modules named in strings (loaded with `importlib`, as the CLI loads its commands).
Nothing is imported to do this, so a module that would fail to import is still read.

The rule table below is the one place to change when modules move: a rule names
modules by pattern (fnmatch over dotted names, e.g. ``runtime.method.*`` once the
method has its own sub-package), and every rule must match at least one module, so a
rename cannot make a rule silently empty.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass
from fnmatch import fnmatchcase
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("runtime", "drivers", "sim_rigs")

# The rooms of runtime/ (DEVELOPERS.md, "Where each part lives").
METHOD = ("runtime.method", "runtime.method.*")          # the numeric method: pure, no clocks
GUARD = ("runtime.guard", "runtime.guard.*")             # rules, modes, fallbacks: decisions
KERNELS = ("runtime.kernels", "runtime.kernels.*")       # the compiled fast path
OFFLINE = ("runtime.offline", "runtime.offline.*")       # simulated time
REALTIME = ("runtime.realtime", "runtime.realtime.*")    # the live loop and its I/O
RECORDS = ("runtime.records", "runtime.records.*")
REVIEW = ("runtime.review", "runtime.review.*")
DASHBOARD = ("runtime.dashboard", "runtime.dashboard.*")
CLI = ("runtime.cli", "runtime.cli.*")
# Event loops, transports and screens: never anywhere below the method, even indirectly.
LIVE_IO = ("asyncio*", "serial*", "aiomqtt*", "paho*", "textual*", "socket*", "selectors*")
# File and process I/O: not in the method modules themselves (configs are read by
# runtime.config; records are written by runtime.records.logs).
FILE_IO = ("io", "pathlib", "shutil", "tempfile", "tomllib", "msgpack*", "subprocess",
           "threading", "multiprocessing*", "mmap")


@dataclass(frozen=True)
class Rule:
    """Modules matching `who` must not import modules matching `never`."""

    name: str
    who: tuple[str, ...]
    never: tuple[str, ...]
    transitive: bool = False
    """Also through our own modules (a path of imports), not just direct imports."""


RULES = (
    Rule("drivers/ imports neither runtime/ nor sim_rigs/",
         ("drivers", "drivers.*"), ("runtime", "runtime.*", "sim_rigs", "sim_rigs.*")),
    Rule("sim_rigs/ never imports runtime/",
         ("sim_rigs", "sim_rigs.*"), ("runtime", "runtime.*")),
    Rule("the method imports no event loop, transport or screen, even indirectly",
         METHOD, LIVE_IO, transitive=True),
    Rule("the method modules do no file or process I/O themselves",
         METHOD, FILE_IO),
    Rule("the guard's decisions import no event loop, transport or screen, even indirectly",
         GUARD, LIVE_IO, transitive=True),
    Rule("the guard's decisions do no file or process I/O themselves", GUARD, FILE_IO),
    Rule("the compiled kernels import no event loop, transport or screen, even indirectly",
         KERNELS, LIVE_IO, transitive=True),
    Rule("the method knows no room built on it",
         METHOD, (*KERNELS, *OFFLINE, *REALTIME, *RECORDS, *REVIEW, *DASHBOARD, *CLI, *GUARD)),
    Rule("the guard and the kernels know neither offline work, the live loop nor the people",
         (*GUARD, *KERNELS), (*OFFLINE, *REALTIME, *RECORDS, *REVIEW, *DASHBOARD, *CLI)),
    Rule("offline work never reaches into the live loop, the dashboard or the command line",
         OFFLINE, (*REALTIME, *DASHBOARD, *CLI)),
    Rule("the live loop never imports the dashboard (it runs in its own process) or the CLI",
         REALTIME, (*DASHBOARD, *CLI)),
    Rule("only the command line imports the command line",
         ("runtime", "runtime.[!c]*", "runtime.config*"), CLI),
)


# ---------------------------------------------------------------- the import graph
def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imports_of(name: str, source: str, is_package: bool, known: set[str]) -> set[str]:
    """Every module `source` (module `name`) imports, anywhere in the file."""
    found: set[str] = set()
    tree = ast.parse(source)
    # A `if __name__ == "__main__":` block runs the file as a program (a second copy of
    # the module), not as an import of it: its imports are not edges of the module.
    tree.body = [n for n in tree.body if not _is_main_guard(n)]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = name.split(".") if is_package else name.split(".")[:-1]
                base = base[:len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            found.add(target)
            # `from pkg import mod` imports the module pkg.mod
            found.update(f"{target}.{a.name}" for a in node.names
                         if f"{target}.{a.name}" in known)
        elif isinstance(node, ast.Constant) and node.value in known and "." in node.value:
            # a module named in a string is loaded by name (`importlib.import_module`,
            # the CLI's command table): an edge too (dotted names only: a bare "runtime"
            # is more often a word than a package)
            found.add(node.value)
    return found


def _is_main_guard(node: ast.stmt) -> bool:
    return (isinstance(node, ast.If) and isinstance(node.test, ast.Compare)
            and isinstance(node.test.left, ast.Name) and node.test.left.id == "__name__"
            and any(isinstance(c, ast.Constant) and c.value == "__main__"
                    for c in node.test.comparators))


def our_modules() -> dict[str, Path]:
    mods = {}
    for pkg in PACKAGES:
        for f in sorted((ROOT / pkg).rglob("*.py")):
            mods[module_name(f)] = f
    return mods


def import_graph() -> dict[str, set[str]]:
    mods = our_modules()
    known = set(mods)
    return {m: imports_of(m, f.read_text(encoding="utf-8"), f.name == "__init__.py", known)
            for m, f in mods.items()}


def matches(name: str, patterns: tuple[str, ...]) -> bool:
    return any(fnmatchcase(name, p) for p in patterns)


def violations(graph: dict[str, set[str]], rule: Rule) -> list[str]:
    """Each forbidden edge as 'a -> b' (or 'a -> ... -> x -> b' through our modules)."""
    out = []
    for start in sorted(m for m in graph if matches(m, rule.who)):
        # breadth-first over our own modules, remembering how we got there
        via: dict[str, str | None] = {start: None}
        queue = [start]
        while queue:
            m = queue.pop(0)
            for dep in sorted(graph[m]):
                if matches(dep, rule.never):
                    chain = [dep, m]
                    while via[chain[-1]] is not None:
                        chain.append(via[chain[-1]])  # type: ignore[arg-type]
                    out.append(" -> ".join(reversed(chain)))
                if rule.transitive and dep in graph and dep not in via:
                    via[dep] = m
                    queue.append(dep)
    return out


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected groups of more than one of our modules (Tarjan)."""
    own = {m: {d for d in deps if d in graph and d != m} for m, deps in graph.items()}
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(own[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            group = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                group.append(w)
                if w == v:
                    break
            if len(group) > 1:
                found.append(sorted(group))

    for v in sorted(own):
        if v not in index:
            visit(v)
    return found


# ---------------------------------------------------------------- the rules
@pytest.mark.parametrize("rule", RULES, ids=[r.name for r in RULES])
def test_imports_follow_the_layering_rule(rule: Rule) -> None:
    graph = import_graph()
    assert any(matches(m, rule.who) for m in graph), \
        f"rule '{rule.name}' matches no module: update its patterns in tests/test_layering.py"
    bad = violations(graph, rule)
    assert not bad, f"{rule.name} (DEVELOPERS.md); forbidden imports:\n  " + "\n  ".join(bad)


def test_our_modules_import_each_other_without_cycles() -> None:
    found = cycles(import_graph())
    assert not found, "import cycles: " + "; ".join(" <-> ".join(c) for c in found)


def test_the_method_modules_open_no_files() -> None:
    """No builtin `open(...)` in the method or guard modules (file I/O without an import)."""
    mods = our_modules()
    bad = []
    for name in sorted(m for m in mods if matches(m, (*METHOD, *GUARD))):
        tree = ast.parse(mods[name].read_text(encoding="utf-8"))
        bad += [f"{name}:{n.lineno}" for n in ast.walk(tree)
                if isinstance(n, ast.Call) and isinstance(n.func, ast.Name)
                and n.func.id == "open"]
    assert not bad, bad


# ---------------------------------------------------------------- the walker itself
SAMPLE = '''
import numpy as np
from . import sibling
from ..drivers import wire

def later():
    import asyncio
    from runtime.method.law import step
    return importlib.import_module("runtime.realtime.loop")

if __name__ == "__main__":
    import textual
'''


def test_the_walker_sees_deferred_and_relative_imports() -> None:
    """A forbidden import hidden in a function, and relative imports, are edges."""
    known = {"pkg.sub.sibling", "pkg.drivers.wire", "runtime.method.law", "runtime.realtime.loop"}
    got = imports_of("pkg.sub.mod", SAMPLE, is_package=False, known=known)
    assert {"numpy", "asyncio", "runtime.method.law", "runtime.realtime.loop", "pkg.sub.sibling",
            "pkg.drivers.wire"} <= got
    assert "textual" not in got  # the program entry point is not an import
    graph = {"pkg.sub.mod": got, "runtime.method.law": set()}
    rule = Rule("no asyncio", ("pkg.*",), ("asyncio",))
    assert violations(graph, rule) == ["pkg.sub.mod -> asyncio"]


def test_the_walker_follows_chains_and_finds_cycles() -> None:
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a", "socket"}, "d": {"a"}}
    rule = Rule("a stays pure", ("a",), ("socket",), transitive=True)
    assert violations(graph, rule) == ["a -> b -> c -> socket"]
    assert violations(graph, Rule("direct only", ("a",), ("socket",))) == []
    assert cycles(graph) == [["a", "b", "c"]]
