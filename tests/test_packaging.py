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


SETUPTOOLS = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
# Shipped data the product reads at run time, one file per data folder (and the docs the
# systemd unit points at): relative to site-packages/clampd, or to the venv for share/.
DATA_FILES = (
    "protocol/examples/SelectProgram.json",
    "protocol/profiles/bench-stick.toml",
    "protocol/MQTT.md",
    "daemon/view/assets/index.html",
    "simulators/scenario/station.toml",
)
DOC_FILES = ("share/doc/clampd/README.md", "share/doc/clampd/BOARD.md")


def test_every_package_folder_is_listed_in_pyproject() -> None:
    # setuptools (build_py) warns about any folder Python could import as a package, with or
    # without an __init__.py, that `packages` leaves out: every folder with an identifier name
    # and a file in git's view of the tree (caches and build output are not).
    listed = set(SETUPTOOLS["packages"])
    found = set()
    for folder, name in FOLDERS.items():
        for path in [ROOT / folder, *(ROOT / folder).rglob("*")]:
            rel = path.relative_to(ROOT / folder)
            if not path.is_dir() or not all(part.isidentifier() for part in rel.parts):
                continue
            if any(f.is_file() and not f.name.endswith(".pyc") for f in path.iterdir()):
                found.add(".".join([name, *rel.parts]))
    assert found == listed
    assert {"clampd.protocol.examples", "clampd.daemon.view.assets"} <= listed


def test_every_package_ships_py_typed() -> None:
    for folder in FOLDERS:
        for init in (ROOT / folder).rglob("__init__.py"):
            assert (init.parent / "py.typed").exists(), init.parent


@pytest.mark.slow
def test_wheel_imports_in_a_fresh_virtualenv(tmp_path: Path) -> None:
    """Build the wheel, install it with its runtime dependencies into a new venv, import."""
    wheel_dir = tmp_path / "wheel"
    build = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-v", "-w", str(wheel_dir), str(ROOT)],
        check=True,
        capture_output=True,
        text=True,
        env={**os.environ, "PIP_DISABLE_PIP_VERSION_CHECK": "1"},
    )
    # The build backend's own warnings (setuptools' warning classes, e.g. "Package ... is
    # absent from the `packages` configuration", a deprecated license table) are bugs here.
    backend_warnings = [
        line.strip()
        for line in (build.stdout + build.stderr).splitlines()
        if "Warning:" in line and ("setuptools" in line or "BuildBackend" in line)
    ]
    assert backend_warnings == [], backend_warnings
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
    package = Path(out.strip()).parent.parent
    missing = [f for f in DATA_FILES if not (package / f).is_file()]
    missing += [f for f in DOC_FILES if not (venv / f).is_file()]
    assert missing == [], missing
    help_out = subprocess.run(
        [str(venv / "bin" / "clampd"), "--help"], check=True, capture_output=True, text=True
    ).stdout
    assert "replay" in help_out
