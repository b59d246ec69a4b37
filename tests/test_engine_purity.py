"""The engine is pure (STYLE.md): its modules import no I/O, clock, network, logging or
randomness, and only the program loader touches the file system.

Walks every module of clampd.daemon.engine, and the first-party modules it imports, with
``ast``; a forbidden import or a call to ``open`` fails the test.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
ENGINE = ROOT / "daemon" / "engine"
FIRST_PARTY = {
    "clampd.protocol": ROOT / "protocol",
    "clampd.daemon": ROOT / "daemon",
}
# What a pure module may import: the standard library's pure parts, numpy, pydantic.
ALLOWED_TOP = {
    "__future__",
    "collections",
    "dataclasses",
    "enum",
    "functools",
    "math",
    "re",
    "tomllib",
    "typing",
    "numpy",
    "pydantic",
    "clampd",
}
# The units parser (clampd.protocol._units) loads pint lazily at the edges: allowed there.
EXTRA = {"clampd.protocol._units": {"pint"}, "clampd.daemon.engine._load": {"pathlib"}}
FORBIDDEN = {"asyncio", "bleak", "aiomqtt", "time", "socket", "logging", "random", "os", "io"}
FILE_MODULE = "clampd.daemon.engine._load"


def _module_file(name: str) -> Path:
    for prefix, folder in FIRST_PARTY.items():
        if name == prefix or name.startswith(prefix + "."):
            rel = name[len(prefix) :].lstrip(".").split(".") if name != prefix else []
            base = folder.joinpath(*rel)
            if base.with_suffix(".py").exists():
                return base.with_suffix(".py")
            return base / "__init__.py"
    raise AssertionError(f"not first-party: {name}")


def _imports(path: Path) -> tuple[set[str], list[int]]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names: set[str] = set()
    opens: list[int] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
        elif (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Name)
            and node.func.id in {"open", "exec", "eval", "__import__"}
        ):
            opens.append(node.lineno)
    return names, opens


def _closure() -> dict[str, set[str]]:
    todo = [f"clampd.daemon.engine.{p.stem}" for p in ENGINE.glob("*.py")]
    todo = [n.removesuffix(".__init__") for n in todo]
    seen: dict[str, set[str]] = {}
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        names, opens = _imports(_module_file(name))
        assert not opens, f"{name} calls open/exec/eval at lines {opens}"
        seen[name] = names
        todo += [n for n in names if n.startswith("clampd.")]
    return seen


def test_engine_and_its_first_party_imports_are_pure() -> None:
    modules = _closure()
    assert "clampd.daemon.engine._engine" in modules
    for name, imported in modules.items():
        allowed = ALLOWED_TOP | EXTRA.get(name, set())
        for imp in imported:
            top = imp.split(".")[0]
            assert top not in FORBIDDEN or top in EXTRA.get(name, set()), f"{name} imports {imp}"
            assert top in allowed, f"{name} imports {imp}, not on the pure list"


@pytest.mark.parametrize(
    "core", ["_engine", "_machine", "_events", "_program", "_settings", "_errors"]
)
def test_core_modules_never_reach_the_file_loader(core: str) -> None:
    modules = _closure()
    todo = [f"clampd.daemon.engine.{core}"]
    reached: set[str] = set()
    while todo:
        n = todo.pop()
        if n in reached:
            continue
        reached.add(n)
        todo += [m for m in modules.get(n, set()) if m in modules]
    assert FILE_MODULE not in reached


def test_the_walker_would_catch_a_forbidden_import(tmp_path: Path) -> None:
    bad = tmp_path / "bad.py"
    bad.write_text("import time\nfrom asyncio import sleep\nopen('x')\n", encoding="utf-8")
    names, opens = _imports(bad)
    assert {"time", "asyncio"} <= names
    assert opens == [3]
