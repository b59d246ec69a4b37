"""Cue sounds for the technician, and the players that put them somewhere.

Theory of operation
-------------------
Five cues of our own design, synthesised with numpy so nothing is shipped as a binary:

========  ======================================  ==========================================
cue       pattern                                 meaning
========  ======================================  ==========================================
approach  two short soft blips, 740 Hz            "nearly there, slow down"
stop      one bright 1568 Hz tone, instant onset  "stop pulling now"
ok        two tones rising, 1047 → 1568 Hz        "joint judged OK"
nok       three low buzzing pulses, 311 Hz        "joint judged NOK"
locked    three tones falling, 880 → 659 → 494    "station locked, do not tighten"
========  ======================================  ==========================================

They differ in pulse count *and* pitch contour, so they can be told apart without looking
and without perfect pitch: one pulse is always stop; two pulses are approach (flat) or OK
(rising); three pulses are NOK (low, flat, buzzy) or locked (falling).

The stop cue's onset must be immediate: the engine fires it early by (cue latency +
reaction time) × angular rate, so any fade-in would add to the overshoot. Every tone gets a
short raised-cosine attack and release to avoid clicks; for stop the attack is 1 ms.

Players
-------
``CuePlayer`` is the port the daemon uses: ``play(cue)`` never blocks (safe to call from
the event loop); each implementation measures the time from ``play()`` to the moment the
first sample is handed to its output, so the daemon can report the real cue latency and
compare it with the configured ``latency_s`` that the engine's prediction uses.

- ``NullCuePlayer``: plays nothing (headless stations, tests).
- ``WavCuePlayer(dir)``: writes each played cue as a numbered WAV file from one worker
  thread (an audit trail of cues for the demo and for checking a station's timing).
- ``DeviceCuePlayer``: a persistent ``sounddevice`` output stream kept open, so a cue
  costs no device open; a new cue pre-empts the one playing (a stop must not wait for an
  approach blip to end). ``sounddevice`` is the optional extra ``audio``, imported lazily.

``make_player(cues_config)`` builds the configured one and degrades to ``NullCuePlayer``
with a warning when ``sounddevice`` or a sound device is missing. Constructing a player
renders the sounds and may open a device: call it off the loop
(``await asyncio.to_thread(make_player, cfg)``); ``close()`` joins threads, likewise.
"""

from __future__ import annotations

import collections
import dataclasses
import enum
import importlib
import itertools
import logging
import os
import queue
import threading
import time
import wave
from collections.abc import Callable
from pathlib import Path
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

__all__ = [
    "SAMPLE_RATE",
    "CuePlayer",
    "CueSound",
    "DeviceCuePlayer",
    "LatencyLog",
    "NullCuePlayer",
    "WavCuePlayer",
    "device_output_problem",
    "make_player",
    "read_wav",
    "render",
    "write_wav",
]

_log = logging.getLogger(__name__)

# 48 kHz is the native rate of most USB and I2S codecs on small boards, so the stream needs
# no resampling (which adds latency); tones up to 2 kHz need far less (common practice).
SAMPLE_RATE = 48_000
# Peak level at volume 1.0: ~-0.9 dBFS leaves headroom for the attack overshoot of the
# summed harmonics after normalisation (our own choice).
_FULL_SCALE = 0.9 * 32767
# Attack/release that removes clicks: a few ms is the usual figure for tone bursts
# (common practice, no source). Stop uses 1 ms so its onset stays immediate.
_ATTACK_S = 0.004
_STOP_ATTACK_S = 0.001
_RELEASE_S = 0.006

Int16Array = npt.NDArray[np.int16]


class CueSound(enum.Enum):
    """The cues the daemon can give."""

    APPROACH = "approach"
    STOP = "stop"
    OK = "ok"
    NOK = "nok"
    LOCKED = "locked"


@dataclasses.dataclass(frozen=True, slots=True)
class _Tone:
    freq_hz: float
    dur_s: float
    gap_after_s: float = 0.0
    level: float = 1.0
    # Relative amplitudes of harmonics 2, 3, 4, 5 (timbre: a buzz is rich in odd ones).
    harmonics: tuple[float, ...] = ()
    attack_s: float = _ATTACK_S


# Frequencies are equal-tempered notes (A4 = 440 Hz): F#5 740, C6 1047, G6 1568, D#4 311,
# A5 880, E5 659, B4 494 — consonant steps, easy to tell apart (our own design).
_DESIGN: dict[CueSound, tuple[_Tone, ...]] = {
    CueSound.APPROACH: (
        _Tone(740.0, 0.060, gap_after_s=0.090, level=0.5),
        _Tone(740.0, 0.060, level=0.5),
    ),
    CueSound.STOP: (_Tone(1568.0, 0.300, level=1.0, harmonics=(0.3,), attack_s=_STOP_ATTACK_S),),
    CueSound.OK: (
        _Tone(1047.0, 0.100, gap_after_s=0.030, level=0.7),
        _Tone(1568.0, 0.160, level=0.7),
    ),
    CueSound.NOK: (
        _Tone(311.0, 0.120, gap_after_s=0.070, harmonics=(0.0, 0.45, 0.0, 0.25)),
        _Tone(311.0, 0.120, gap_after_s=0.070, harmonics=(0.0, 0.45, 0.0, 0.25)),
        _Tone(311.0, 0.120, harmonics=(0.0, 0.45, 0.0, 0.25)),
    ),
    CueSound.LOCKED: (
        _Tone(880.0, 0.120, gap_after_s=0.040, level=0.8),
        _Tone(659.0, 0.120, gap_after_s=0.040, level=0.8),
        _Tone(494.0, 0.180, level=0.8),
    ),
}


def design(cue: CueSound) -> tuple[tuple[float, float, float], ...]:
    """(frequency Hz, duration s, gap after s) per pulse: the published design of a cue."""
    return tuple((t.freq_hz, t.dur_s, t.gap_after_s) for t in _DESIGN[cue])


def _tone(t: _Tone, rate: int) -> npt.NDArray[np.float64]:
    n = round(t.dur_s * rate)
    x = np.arange(n, dtype=np.float64) / rate
    y = np.sin(2 * np.pi * t.freq_hz * x)
    for k, amp in enumerate(t.harmonics, start=2):
        if amp and k * t.freq_hz < rate / 2:
            y += amp * np.sin(2 * np.pi * k * t.freq_hz * x)
    y /= 1.0 + sum(t.harmonics)
    env = np.ones(n)
    na = max(1, round(t.attack_s * rate))
    nr = max(1, round(_RELEASE_S * rate))
    env[:na] = 0.5 - 0.5 * np.cos(np.pi * np.arange(na) / na)
    env[-nr:] = np.minimum(env[-nr:], 0.5 + 0.5 * np.cos(np.pi * (np.arange(nr) + 1) / nr))
    return t.level * env * y


def render(cue: CueSound, *, rate: int = SAMPLE_RATE, volume: float = 1.0) -> Int16Array:
    """The cue as mono 16-bit samples at ``rate``, scaled by ``volume`` (0..1)."""
    if not 0.0 <= volume <= 1.0:
        raise ValueError(f"volume must be within 0..1, got {volume}")
    if rate < 8000:
        raise ValueError(f"rate must be >= 8000 Hz, got {rate}")
    parts: list[npt.NDArray[np.float64]] = []
    for t in _DESIGN[cue]:
        parts.append(_tone(t, rate))
        if t.gap_after_s:
            parts.append(np.zeros(round(t.gap_after_s * rate)))
    signal = np.concatenate(parts)
    return np.round(signal * _FULL_SCALE * volume).astype(np.int16)


def write_wav(path: str | os.PathLike[str], samples: Int16Array, rate: int = SAMPLE_RATE) -> None:
    """Write mono 16-bit PCM with the stdlib ``wave`` module."""
    with wave.open(os.fspath(path), "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(rate)
        w.writeframes(samples.astype("<i2").tobytes())


def read_wav(path: str | os.PathLike[str]) -> tuple[Int16Array, int]:
    """Read a mono 16-bit WAV written by ``write_wav``: (samples, rate)."""
    with wave.open(os.fspath(path), "rb") as w:
        if w.getnchannels() != 1 or w.getsampwidth() != 2:
            raise ValueError(f"{path}: expected mono 16-bit PCM")
        data = w.readframes(w.getnframes())
        return np.frombuffer(data, dtype="<i2").astype(np.int16), w.getframerate()


class LatencyLog:
    """Thread-safe record of recent play-to-first-sample latencies, in seconds."""

    # Enough for a shift's worth of statistics without growing forever (our own choice).
    KEEP = 512

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._values: collections.deque[float] = collections.deque(maxlen=self.KEEP)

    def record(self, seconds: float) -> None:
        """Add one measurement (called from whichever thread handed the sample over)."""
        with self._lock:
            self._values.append(seconds)

    def snapshot(self) -> list[float]:
        """The recent measurements, oldest first."""
        with self._lock:
            return list(self._values)

    @property
    def last_s(self) -> float | None:
        """The most recent measurement, if any."""
        with self._lock:
            return self._values[-1] if self._values else None


class CuePlayer(Protocol):
    """Port for cue output. ``play`` must not block; ``close`` may (call it off the loop)."""

    latency: LatencyLog

    def play(self, cue: CueSound) -> None:
        """Start the cue now, pre-empting or queueing after any cue in progress."""

    def close(self) -> None:
        """Release the output; further ``play`` calls are ignored."""


class NullCuePlayer:
    """Plays nothing; records the (tiny) cost of the call so reports stay uniform."""

    def __init__(self) -> None:
        self.latency = LatencyLog()
        self.played: list[CueSound] = []

    def play(self, cue: CueSound) -> None:
        """Drop the cue."""
        t0 = time.perf_counter()
        self.played.append(cue)
        self.latency.record(time.perf_counter() - t0)

    def close(self) -> None:
        """Nothing to release."""


class WavCuePlayer:
    """Writes each played cue to ``dir/NNNNNN-<cue>.wav`` from one worker thread.

    Latency is measured from ``play()`` to the moment the samples are handed to the
    ``wave`` writer. ``close()`` waits until every queued cue is written.
    """

    def __init__(
        self, directory: str | os.PathLike[str], *, rate: int = SAMPLE_RATE, volume: float = 0.8
    ) -> None:
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.rate = rate
        self.latency = LatencyLog()
        self._sounds = {c: render(c, rate=rate, volume=volume) for c in CueSound}
        self._queue: queue.SimpleQueue[tuple[CueSound, float] | None] = queue.SimpleQueue()
        start = max(
            (int(p.name[:6]) for p in self.directory.glob("[0-9]" * 6 + "-*.wav")), default=0
        )
        self._counter = itertools.count(start + 1)
        self._closed = False
        self._thread = threading.Thread(target=self._work, name="clampd-cues-wav", daemon=True)
        self._thread.start()

    def play(self, cue: CueSound) -> None:
        """Queue the cue for writing (never blocks)."""
        if not self._closed:
            self._queue.put((cue, time.perf_counter()))

    def close(self) -> None:
        """Write what is queued, then stop the worker (blocks: call off the loop)."""
        if self._closed:
            return
        self._closed = True
        self._queue.put(None)
        self._thread.join()

    def _work(self) -> None:
        while (item := self._queue.get()) is not None:
            cue, t0 = item
            path = self.directory / f"{next(self._counter):06d}-{cue.value}.wav"
            try:
                with wave.open(os.fspath(path), "wb") as w:
                    w.setnchannels(1)
                    w.setsampwidth(2)
                    w.setframerate(self.rate)
                    self.latency.record(time.perf_counter() - t0)
                    w.writeframes(self._sounds[cue].astype("<i2").tobytes())
            except OSError:
                _log.exception("cue %s: cannot write %s", cue.value, path)


# A stream factory builds an output stream object with start()/stop()/close() and a
# `latency` attribute, calling `callback(outdata, frames, time_info, status)`; the default is
# sounddevice.OutputStream. Passing another one is the seam for stations with other audio
# stacks (and for tests, where no sound hardware exists).
StreamFactory = Callable[..., Any]


class DeviceCuePlayer:
    """Plays cues on a sound device through one persistent output stream.

    The stream's callback runs on the audio thread and copies the current cue's next
    samples; ``play`` swaps the current cue under a lock held for microseconds. Latency is
    measured to the callback that hands over the cue's first sample; the device's own
    output latency (``output_latency_s``) comes on top of that before sound is heard.
    """

    # 5 ms blocks at 48 kHz: small enough that a cue starts within one block, large enough
    # for a Raspberry Pi class board to keep up without underruns (our own estimate).
    BLOCK_FRAMES = 240

    def __init__(
        self,
        *,
        rate: int = SAMPLE_RATE,
        volume: float = 0.8,
        device: int | str | None = None,
        stream_factory: StreamFactory | None = None,
    ) -> None:
        self.rate = rate
        self.latency = LatencyLog()
        self._sounds = {c: render(c, rate=rate, volume=volume) for c in CueSound}
        self._lock = threading.Lock()
        self._current: Int16Array | None = None
        self._pos = 0
        self._t0 = 0.0
        self._first_pending = False
        self._closed = False
        if stream_factory is None:
            import sounddevice  # optional extra "audio"; ImportError/OSError when missing

            stream_factory = sounddevice.OutputStream
        self._stream = stream_factory(
            samplerate=rate,
            channels=1,
            dtype="int16",
            blocksize=self.BLOCK_FRAMES,
            latency="low",
            device=device,
            callback=self._callback,
        )
        self._stream.start()

    @property
    def output_latency_s(self) -> float:
        """The device's reported output latency (after the callback hands samples over)."""
        return float(self._stream.latency)

    def play(self, cue: CueSound) -> None:
        """Make ``cue`` the current sound, pre-empting any cue in progress."""
        if self._closed:
            return
        with self._lock:
            self._current = self._sounds[cue]
            self._pos = 0
            self._t0 = time.perf_counter()
            self._first_pending = True

    def close(self) -> None:
        """Stop and close the stream (blocks briefly: call off the loop)."""
        if self._closed:
            return
        self._closed = True
        self._stream.stop()
        self._stream.close()

    def _callback(self, outdata: Any, frames: int, time_info: Any, status: Any) -> None:
        out = outdata[:, 0] if getattr(outdata, "ndim", 1) == 2 else outdata
        with self._lock:
            current = self._current
            if current is None:
                out[:] = 0
                return
            if self._first_pending:
                self.latency.record(time.perf_counter() - self._t0)
                self._first_pending = False
            chunk = current[self._pos : self._pos + frames]
            self._pos += len(chunk)
            if self._pos >= len(current):
                self._current = None
        out[: len(chunk)] = chunk
        out[len(chunk) :] = 0


def make_player(
    output: str,
    *,
    wav_dir: str | os.PathLike[str] | None = None,
    volume: float = 0.8,
    rate: int = SAMPLE_RATE,
    device: int | str | None = None,
) -> tuple[CuePlayer, list[str]]:
    """Build the player for ``output`` ("device", "wav", "none"); return it with warnings.

    "device" degrades to ``NullCuePlayer`` with a warning when ``sounddevice`` (extra
    ``audio``), its PortAudio library or a sound device is missing: a station without a
    speaker must still tighten and report. Blocks (renders, may open a device): call it
    off the event loop. Raises ``ValueError`` for an unknown output or "wav" without a dir.
    """
    if output == "none":
        return NullCuePlayer(), []
    if output == "wav":
        if wav_dir is None:
            raise ValueError("cue output 'wav' needs a directory")
        return WavCuePlayer(wav_dir, rate=rate, volume=volume), []
    if output != "device":
        raise ValueError(f"unknown cue output {output!r} (device, wav, none)")
    try:
        return DeviceCuePlayer(rate=rate, volume=volume, device=device), []
    except ImportError:
        reason = _NOT_INSTALLED
    except OSError as exc:  # PortAudio library missing
        reason = _no_portaudio(exc)
    except Exception as exc:  # sounddevice.PortAudioError: no device, busy, bad rate
        reason = f"no usable sound device ({type(exc).__name__}: {exc})"
    # No "cues:" prefix: the caller names the source when it logs the line.
    return NullCuePlayer(), [f"{reason}; cues are not played"]


_NOT_INSTALLED = "the 'sounddevice' package is not installed (pip install 'clampd[audio]')"


def _no_portaudio(exc: OSError) -> str:
    return f"the PortAudio library is missing ({exc})"


def device_output_problem() -> str | None:
    """Why cue output "device" cannot play on this machine, or None when ``sounddevice`` and
    its PortAudio library load. Opens no device (a workstation checking a board's file has
    none), so a missing or busy device shows only when the daemon starts."""
    try:
        importlib.import_module("sounddevice")
    except ImportError:
        return _NOT_INSTALLED
    except OSError as exc:
        return _no_portaudio(exc)
    return None
