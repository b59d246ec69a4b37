"""Coverage-guided fuzz targets (atheris, libFuzzer) for every input clampd takes from outside.

Run one target by name; extra arguments go to libFuzzer::

    .venv/bin/python tests/fuzz/harness.py frame -atheris_runs=200000
    .venv/bin/python tests/fuzz/harness.py command -max_total_time=600 corpus/command/

Targets and the only error each may raise (anything else is a crash libFuzzer reports with
the input that caused it):

- ``frame``: bytes → ``decode_frame`` → ``SequenceChecker`` → ``Engine.feed``
  (``FrameError``, ``SensorDataError``);
- ``profile``: a declarative sensor profile as TOML text, then bytes through it
  (``ProfileError``, ``FrameError``);
- ``config``: a station file as TOML text (``ConfigError``);
- ``command``: a command topic and payload (``CommandError``).

Only clampd's own modules are instrumented (numpy, pydantic and tomllib are not: coverage of
their insides would steer the fuzzer away from our code). Needs the ``fuzz`` extra (atheris).
"""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Callable
from pathlib import Path

import atheris

with atheris.instrument_imports(include=["clampd"]):
    from clampd.daemon.engine import Engine, EngineSettings, SensorDataError, parse_program
    from clampd.daemon.runtime import ConfigError, parse_config
    from clampd.protocol import (
        CommandError,
        CommandName,
        CommandProperties,
        FrameError,
        ProfileError,
        SequenceChecker,
        Topics,
        axis_rate,
        decode_frame,
        load_profile,
        parse_command,
    )

ROOT = Path(__file__).resolve().parents[2]
PROGRAM = parse_program((ROOT / "tests" / "data" / "program_torque_angle.toml").read_text())
TOPICS = Topics("brackenfield/deck-assembly/line-3/st-120")
COMMAND_TOPICS = [TOPICS.command(c) for c in CommandName]


def frame(data: bytes) -> None:
    """Split the input into notifications at 0xFF 0xFE markers and feed them in order."""
    checker = SequenceChecker()
    engine = Engine(PROGRAM, EngineSettings())
    for chunk in data.split(b"\xff\xfe"):
        try:
            decoded = decode_frame(chunk)
        except FrameError:
            continue
        check = checker.feed(decoded)
        if check.accepted:
            try:
                engine.feed(check.times_s(), decoded.torque_nm, axis_rate(decoded, "z", +1))
            except SensorDataError:
                continue


def profile(data: bytes) -> None:
    """TOML text, then NUL NUL, then one notification to decode with the profile."""
    text_bytes, _, frame_bytes = data.partition(b"\0\0")
    # Plain decoding keeps a seed file intact, so mutations start from a valid profile; the
    # comment line makes sure load_profile reads a str as TOML text (it holds an '=').
    text = "# =\n" + text_bytes.decode("utf-8", "replace")
    try:
        prof = load_profile(text)
    except ProfileError:
        return
    with contextlib.suppress(FrameError):
        prof.decode(frame_bytes)


def config(data: bytes) -> None:
    with contextlib.suppress(ConfigError):
        parse_config(data.decode("utf-8", "replace"), env={}, check_files=False)


def command(data: bytes) -> None:
    fdp = atheris.FuzzedDataProvider(data)
    pick = fdp.ConsumeIntInRange(0, len(COMMAND_TOPICS))
    topic = (
        COMMAND_TOPICS[pick]
        if pick < len(COMMAND_TOPICS)
        else fdp.ConsumeUnicodeNoSurrogates(fdp.ConsumeIntInRange(0, 120))
    )
    response = fdp.ConsumeUnicodeNoSurrogates(fdp.ConsumeIntInRange(0, 60)) or None
    payload = fdp.ConsumeBytes(fdp.remaining_bytes())
    with contextlib.suppress(CommandError):
        parse_command(TOPICS, topic, payload, CommandProperties(response_topic=response))


TARGETS: dict[str, Callable[[bytes], None]] = {
    "frame": frame,
    "profile": profile,
    "config": config,
    "command": command,
}


def main() -> None:
    if len(sys.argv) < 2 or sys.argv[1] not in TARGETS:
        print(f"usage: harness.py {{{','.join(TARGETS)}}} [libFuzzer options]", file=sys.stderr)
        raise SystemExit(2)
    target = TARGETS[sys.argv[1]]
    atheris.Setup([sys.argv[0], *sys.argv[2:]], target)
    atheris.Fuzz()


if __name__ == "__main__":
    main()
