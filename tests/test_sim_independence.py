"""The simulator stays an independent truth: no engine, no daemon, no protocol decoder inside.

Walks every module under simulators/ with ``ast`` and fails on an import (static or through
``importlib``/``__import__``) of ``clampd.daemon`` or of the protocol's decoders
(``clampd.protocol._frame``, ``clampd.protocol._declarative``, or their public names re-exported
from ``clampd.protocol``). ``simulators/studies`` is exempt by design: studies are where the
engine is scored against this truth, so they must import it.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SIM = ROOT / "simulators"
EXEMPT = {SIM / "studies"}
DECODER_MODULES = ("_frame", "_declarative")


def decoder_names() -> set[str]:
    """Public names of the decoder modules, read from their ``__all__`` (without importing)."""
    names: set[str] = set()
    for mod in DECODER_MODULES:
        path = ROOT / "protocol" / f"{mod}.py"
        if not path.exists():
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Assign) and any(
                isinstance(t, ast.Name) and t.id == "__all__" for t in node.targets
            ):
                names |= {
                    e.value
                    for e in getattr(node.value, "elts", [])
                    if isinstance(e, ast.Constant) and isinstance(e.value, str)
                }
    return names


def forbidden_module(name: str) -> bool:
    parts = name.split(".")
    if parts[:2] == ["clampd", "daemon"]:
        return True
    return parts[:2] == ["clampd", "protocol"] and len(parts) > 2 and parts[2] in DECODER_MODULES


def violations(source: str, banned_names: set[str]) -> list[str]:
    found: list[str] = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [a.name for a in node.names if forbidden_module(a.name)]
        elif isinstance(node, ast.ImportFrom) and node.module is not None:
            if forbidden_module(node.module):
                found.append(node.module)
            elif node.module == "clampd.protocol":
                found += [f"clampd.protocol.{a.name}" for a in node.names if a.name in banned_names]
                found += [
                    f"clampd.protocol.{a.name}"
                    for a in node.names
                    if forbidden_module(f"clampd.protocol.{a.name}")
                ]
            elif node.module == "clampd":
                found += [f"clampd.{a.name}" for a in node.names if a.name == "daemon"]
        elif isinstance(node, ast.Attribute) and node.attr in banned_names:
            found.append(f"attribute .{node.attr}")
        elif isinstance(node, ast.Call):
            for arg in node.args:
                if (
                    isinstance(arg, ast.Constant)
                    and isinstance(arg.value, str)
                    and forbidden_module(arg.value)
                ):
                    found.append(f"dynamic import of {arg.value}")
    return found


def simulator_modules() -> list[Path]:
    return sorted(p for p in SIM.rglob("*.py") if not any(p.is_relative_to(ex) for ex in EXEMPT))


def test_the_walk_sees_the_simulator_core() -> None:
    names = {p.name for p in simulator_modules()}
    assert {"_joint.py", "_sensor.py", "_encoder.py", "_operator.py", "_rundown.py"} <= names
    assert "decode_frame" in decoder_names()


@pytest.mark.parametrize("path", simulator_modules(), ids=lambda p: str(p.relative_to(ROOT)))
def test_simulator_module_imports_neither_engine_nor_decoder(path: Path) -> None:
    assert violations(path.read_text(encoding="utf-8"), decoder_names()) == []


@pytest.mark.parametrize(
    "source",
    [
        "import clampd.daemon.engine",
        "from clampd.daemon import engine",
        "from clampd import daemon",
        "from clampd.protocol._frame import decode_frame",
        "from clampd.protocol import decode_frame",
        "from clampd.protocol import _declarative",
        "import clampd.protocol\nclampd.protocol.decode_frame(b'')",
        "import importlib\nimportlib.import_module('clampd.daemon.engine')",
    ],
)
def test_the_checker_catches_each_way_in(source: str) -> None:
    assert violations(source, decoder_names()) != []


def test_the_checker_allows_what_the_simulator_may_use() -> None:
    allowed = "from clampd.protocol import NM_PER_FT_LBF\nimport numpy\nimport clampd.simulators"
    assert violations(allowed, decoder_names()) == []
