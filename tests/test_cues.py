"""Cue sounds and players.

Sounds are analysed with general-purpose references: pulse envelopes with
``scipy.signal.hilbert``, pitch with ``scipy.signal.periodogram``, WAV files read back with
``scipy.io.wavfile``. Note frequencies are checked against equal temperament with
A4 = 440 Hz (ISO 16:1975, standard tuning frequency).
"""

from __future__ import annotations

import asyncio
import sys
import threading
import types
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pytest
from blockbuster import BlockingError, blockbuster_ctx
from scipy import signal
from scipy.io import wavfile

from clampd.daemon.runtime._cues import (
    SAMPLE_RATE,
    CueSound,
    DeviceCuePlayer,
    NullCuePlayer,
    WavCuePlayer,
    design,
    make_player,
    read_wav,
    render,
    write_wav,
)

RATE = SAMPLE_RATE


@pytest.fixture
def runtime_guard() -> Iterator[object]:
    """Fail on blocking calls made by the runtime's code inside the event loop.

    Scans the runtime package by name: the shared ``blockbuster`` fixture scans
    ``clampd``, a namespace package whose editable-install path matches no file.
    """
    with blockbuster_ctx(["clampd.daemon.runtime"]) as bb:
        yield bb


def _pulses(x: npt.NDArray[np.int16]) -> list[tuple[int, int]]:
    """(start, end) sample ranges where the Hilbert envelope is above 10 % of its peak."""
    env = np.abs(signal.hilbert(x.astype(np.float64)))
    # 2 ms moving average smooths the envelope ripple of the harmonics.
    win = int(0.002 * RATE)
    env = np.convolve(env, np.ones(win) / win, mode="same")
    on = env > 0.1 * env.max()
    edges = np.flatnonzero(np.diff(on.astype(np.int8)))
    bounds = np.concatenate(([0] if on[0] else [], edges + 1, [len(x)] if on[-1] else []))
    pairs = [(int(a), int(b)) for a, b in zip(bounds[::2], bounds[1::2], strict=True)]
    return [(a, b) for a, b in pairs if b - a > 0.02 * RATE]  # ignore < 20 ms specks


def _pitch(x: npt.NDArray[np.int16]) -> float:
    f, p = signal.periodogram(x.astype(np.float64), fs=RATE, nfft=1 << 20)
    return float(f[np.argmax(p)])


def _signature(cue: CueSound) -> tuple[int, str, float]:
    x = render(cue)
    pitches = [_pitch(x[a:b]) for a, b in _pulses(x)]
    steps = np.sign(np.round(np.diff(pitches), 0)) if len(pitches) > 1 else np.array([0.0])
    contour = "rising" if all(steps > 0) else "falling" if all(steps < 0) else "flat"
    if not (all(steps > 0) or all(steps < 0) or all(steps == 0)):
        contour = "mixed"
    return len(pitches), contour, round(pitches[0], -1)


def _equal_tempered(semitones_from_a4: int) -> float:
    return float(440.0 * 2.0 ** (semitones_from_a4 / 12))


@pytest.mark.parametrize(
    ("cue", "pulses", "contour", "notes"),
    [
        (CueSound.APPROACH, 2, "flat", [9]),  # F#5
        (CueSound.STOP, 1, "flat", [22]),  # G6
        (CueSound.OK, 2, "rising", [15, 22]),  # C6, G6
        (CueSound.NOK, 3, "flat", [-6]),  # D#4
        (CueSound.LOCKED, 3, "falling", [12, 7, 2]),  # A5, E5, B4
    ],
)
def test_each_cue_has_its_designed_pulses_and_pitches(
    cue: CueSound, pulses: int, contour: str, notes: list[int]
) -> None:
    x = render(cue)
    found = _pulses(x)
    assert len(found) == pulses
    measured = [_pitch(x[a:b]) for a, b in found]
    expected = [_equal_tempered(n) for n in notes]
    expected = expected * (pulses // len(expected))
    # Design notes are rounded to 1 Hz; the periodogram resolves 0.05 Hz.
    assert measured == pytest.approx(expected, abs=1.0)
    # Pulse lengths match the design within the attack/release smoothing (±5 ms).
    for (a, b), (_, dur, _) in zip(found, design(cue), strict=True):
        assert (b - a) / RATE == pytest.approx(dur, abs=0.005)
    assert _signature(cue)[:2] == (pulses, contour)


def test_cues_can_be_told_apart_by_count_contour_and_pitch() -> None:
    signatures = {cue: _signature(cue) for cue in CueSound}
    assert len(set(signatures.values())) == len(CueSound), signatures
    # Count and contour alone (no absolute pitch needed) already separate all five.
    assert len({s[:2] for s in signatures.values()}) == len(CueSound)


def test_stop_cue_onset_is_immediate_and_all_cues_are_short() -> None:
    x = render(CueSound.STOP).astype(np.float64)
    first_loud = int(np.argmax(np.abs(x) >= 0.5 * np.abs(x).max()))
    assert first_loud / RATE < 0.003  # half of full level within 3 ms
    assert abs(x[0]) < 1.0  # and yet no click: it starts from silence
    for cue in CueSound:
        y = render(cue)
        assert len(y) / RATE <= 0.7
        assert int(np.abs(y.astype(np.int32)).max()) <= 0.9 * 32767 + 1  # no clipping
        assert y[0] == 0
        assert abs(int(y[-1])) < 200  # ends released, no click


def test_volume_scales_the_samples() -> None:
    full = render(CueSound.OK, volume=1.0).astype(np.float64)
    half = render(CueSound.OK, volume=0.5).astype(np.float64)
    assert np.abs(half).max() == pytest.approx(np.abs(full).max() / 2, abs=1)
    assert not render(CueSound.OK, volume=0.0).any()
    with pytest.raises(ValueError, match="volume"):
        render(CueSound.OK, volume=1.5)


def test_wav_files_read_back_with_scipy(tmp_path: Path) -> None:
    x = render(CueSound.LOCKED)
    write_wav(tmp_path / "locked.wav", x)
    rate, data = wavfile.read(tmp_path / "locked.wav")
    assert rate == RATE
    assert data.dtype == np.int16
    assert np.array_equal(data, x)
    y, r = read_wav(tmp_path / "locked.wav")
    assert r == RATE
    assert np.array_equal(y, x)


# -- players ------------------------------------------------------------------------------


def test_null_player_drops_and_records() -> None:
    p = NullCuePlayer()
    p.play(CueSound.STOP)
    p.play(CueSound.OK)
    assert p.played == [CueSound.STOP, CueSound.OK]
    assert len(p.latency.snapshot()) == 2
    p.close()


async def test_wav_player_never_blocks_the_loop_and_writes_in_order(
    tmp_path: Path, runtime_guard: object
) -> None:
    player = await asyncio.to_thread(WavCuePlayer, tmp_path, volume=0.8)
    sequence = [CueSound.APPROACH, CueSound.STOP, CueSound.OK]
    for cue in sequence:
        player.play(cue)  # from the loop, under blockbuster
    await asyncio.to_thread(player.close)
    await asyncio.to_thread(_check_written, tmp_path, sequence)
    latencies = player.latency.snapshot()
    assert len(latencies) == 3
    assert all(v >= 0.0 for v in latencies)
    player.play(CueSound.NOK)  # after close: ignored, nothing written
    await asyncio.to_thread(_check_written, tmp_path, sequence)


def _check_written(directory: Path, sequence: list[CueSound]) -> None:
    files = sorted(p.name for p in directory.glob("*.wav"))
    assert files == [f"{i:06d}-{cue.value}.wav" for i, cue in enumerate(sequence, start=1)]
    for name, cue in zip(files, sequence, strict=True):
        rate, data = wavfile.read(directory / name)
        assert rate == RATE
        assert np.array_equal(data, render(cue, volume=0.8))


async def test_the_guard_catches_the_wav_player_built_inside_the_loop(
    tmp_path: Path, runtime_guard: object
) -> None:
    # Control for the test above: construction does file I/O and belongs off the loop.
    with pytest.raises(BlockingError):
        WavCuePlayer(tmp_path)


def test_wav_player_continues_numbering_across_runs(tmp_path: Path) -> None:
    for _ in range(2):
        p = WavCuePlayer(tmp_path)
        p.play(CueSound.NOK)
        p.close()
    assert sorted(p.name for p in tmp_path.glob("*.wav")) == [
        "000001-nok.wav",
        "000002-nok.wav",
    ]


class _SoundCardStandIn:
    """Output stream without hardware (none exists here): calls the callback in blocks from
    its own thread, like PortAudio's audio thread, and keeps what it was handed."""

    latency = 0.012

    def __init__(self, *, callback: Any, blocksize: int, **_: Any) -> None:
        self.callback = callback
        self.blocksize = blocksize
        self.output: list[npt.NDArray[np.int16]] = []
        self.blocks = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self.instances.append(self)

    instances: list[_SoundCardStandIn] = []  # noqa: RUF012

    def start(self) -> None:
        self._thread.start()

    def _run(self) -> None:
        while not self._stop.is_set():
            out = np.full((self.blocksize, 1), 12345, dtype=np.int16)  # garbage to overwrite
            self.callback(out, self.blocksize, None, None)
            self.output.append(out[:, 0].copy())
            self.blocks += 1
            self._stop.wait(0.001)

    def wait_blocks(self, n: int) -> None:
        target = self.blocks + n
        while self.blocks < target:
            self._stop.wait(0.001)

    def stop(self) -> None:
        self._stop.set()
        self._thread.join()

    def close(self) -> None:
        pass


def _nonzero_run(chunks: list[npt.NDArray[np.int16]]) -> npt.NDArray[np.int16]:
    data = np.concatenate(chunks)
    idx = np.flatnonzero(data)
    return data[idx[0] : idx[-1] + 1]


def test_device_player_hands_the_exact_cue_to_the_stream() -> None:
    player = DeviceCuePlayer(volume=0.8, stream_factory=_SoundCardStandIn)
    card = _SoundCardStandIn.instances[-1]
    card.wait_blocks(3)
    assert not np.concatenate(card.output).any()  # silence (not garbage) while idle
    player.play(CueSound.STOP)
    cue = render(CueSound.STOP, volume=0.8)
    card.wait_blocks(len(cue) // player.BLOCK_FRAMES + 3)
    player.close()
    played = _nonzero_run(card.output)
    assert np.array_equal(played, _nonzero_run([cue]))
    assert len(player.latency.snapshot()) == 1
    assert player.output_latency_s == pytest.approx(0.012)


def test_device_player_stop_preempts_an_approach_in_progress() -> None:
    player = DeviceCuePlayer(stream_factory=_SoundCardStandIn)
    card = _SoundCardStandIn.instances[-1]
    player.play(CueSound.APPROACH)
    card.wait_blocks(2)
    player.play(CueSound.STOP)
    stop = render(CueSound.STOP, volume=0.8)
    card.wait_blocks(len(stop) // player.BLOCK_FRAMES + 3)
    player.close()
    data = np.concatenate(card.output)
    # The whole stop cue appears, uninterrupted, after the approach was cut short.
    stop_body = _nonzero_run([stop])
    starts = np.flatnonzero(data == stop_body[0])
    assert any(np.array_equal(data[h : h + len(stop_body)], stop_body) for h in starts)
    assert len(player.latency.snapshot()) == 2


def test_device_output_degrades_to_none_without_sounddevice(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.setitem(sys.modules, "sounddevice", None)  # import now raises ImportError
    player, warnings = make_player("device")
    assert isinstance(player, NullCuePlayer)
    assert len(warnings) == 1
    assert "not installed" in warnings[0]


def test_device_output_degrades_to_none_without_a_device(monkeypatch: pytest.MonkeyPatch) -> None:
    class PortAudioError(Exception):
        pass

    def no_device(**_: Any) -> None:
        raise PortAudioError("Error querying device -1")

    fake = types.ModuleType("sounddevice")
    fake.OutputStream = no_device  # type: ignore[attr-defined]
    monkeypatch.setitem(sys.modules, "sounddevice", fake)
    player, warnings = make_player("device")
    assert isinstance(player, NullCuePlayer)
    assert "no usable sound device" in warnings[0]
    assert "querying device" in warnings[0]


def test_make_player_other_outputs(tmp_path: Path) -> None:
    p, w = make_player("none")
    assert isinstance(p, NullCuePlayer)
    assert w == []
    p, w = make_player("wav", wav_dir=tmp_path)
    assert isinstance(p, WavCuePlayer)
    p.close()
    with pytest.raises(ValueError, match="needs a directory"):
        make_player("wav")
    with pytest.raises(ValueError, match="unknown cue output"):
        make_player("speaker")
