"""The distribution installs and imports as documented (issue: foundation)."""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FOLDERS = {
    "protocol": "clampd.protocol",
    "daemon": "clampd.daemon",
    "simulators": "clampd.simulators",
}


def test_every_package_folder_is_listed_in_pyproject() -> None:
    listed = set(
        tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"]
    )
    found = set()
    for folder, name in FOLDERS.items():
        for init in (ROOT / folder).rglob("__init__.py"):
            rel = init.parent.relative_to(ROOT / folder)
            found.add(".".join([name, *rel.parts]))
    assert found == listed


def test_every_package_ships_py_typed() -> None:
    for folder in FOLDERS:
        for init in (ROOT / folder).rglob("__init__.py"):
            assert (init.parent / "py.typed").exists(), init.parent


@pytest.mark.slow
def test_wheel_imports_in_a_fresh_virtualenv(tmp_path: Path) -> None:
    """Build the wheel, install it with its runtime dependencies into a new venv, import."""
    wheel_dir = tmp_path / "wheel"
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w", str(wheel_dir), str(ROOT)],
        check=True,
        env={**os.environ, "PIP_DISABLE_PIP_VERSION_CHECK": "1"},
    )
    (wheel,) = wheel_dir.glob("clampd-*.whl")
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True)
    py = venv / "bin" / "python"
    subprocess.run([str(py), "-m", "pip", "install", "-q", str(wheel)], check=True)
    code = (
        "import clampd.protocol, clampd.daemon, clampd.simulators, clampd.daemon.cli, sys;"
        "print(clampd.protocol.__file__)"
    )
    out = subprocess.run(
        [str(py), "-c", code], check=True, capture_output=True, text=True, cwd=tmp_path
    ).stdout
    assert str(venv) in out, out
    help_out = subprocess.run(
        [str(venv / "bin" / "clampd"), "--help"], check=True, capture_output=True, text=True
    ).stdout
    assert "replay" in help_out
