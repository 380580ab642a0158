"""Synthesised sounds for the simulator, tests, demo and benchmarks.

Every generator is ``fn(rate_hz, duration_s, rng) -> float32 mono array in [-1, 1]``, with
the sound starting at t = 0; it is deterministic for a given ``numpy.random.Generator``.
Vectorised numpy/scipy only: loops run over events (pulses, barks, notes), never samples.
No recorded audio and no downloads.
"""

from __future__ import annotations

import io
from collections.abc import Callable
from functools import lru_cache, wraps

import numpy as np
import soundfile as sf
from scipy import signal

Generator = Callable[[int, float, np.random.Generator], np.ndarray]

# Kinds that are going on already when a clip starts; the others begin at an offset.
CONTINUOUS_KINDS = frozenset({"tv_babble", "vacuum", "traffic", "room_tone"})
ROOM_TONE_DBFS = -55.0


# ---------------------------------------------------------------------------------------
# Building blocks


def _sound(fn: Generator) -> Generator:
    """Wrap a generator: check the arguments, and give an empty array for zero samples."""

    @wraps(fn)
    def wrapper(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
        if rate_hz <= 0 or duration_s < 0:
            raise ValueError(f"need rate_hz > 0 and duration_s >= 0, got {rate_hz} and {duration_s}")
        if int(round(rate_hz * duration_s)) == 0:
            return np.zeros(0, dtype=np.float32)
        return fn(rate_hz, duration_s, rng)

    return wrapper


def _phase(freq_hz: np.ndarray | float, rate_hz: int, n: int) -> np.ndarray:
    """Phase in radians (wrapped to [0, 2 pi), float32) of a tone whose frequency may vary."""
    f = np.broadcast_to(np.asarray(freq_hz, dtype=np.float64), (n,))
    # Accumulate in float64 (float32 would drift over a 10 s clip), then wrap and narrow.
    return np.mod(2.0 * np.pi * np.cumsum(f) / rate_hz, 2.0 * np.pi).astype(np.float32)


def _harmonic(phase: np.ndarray, rolloff: float) -> np.ndarray:
    """Sum over k >= 1 of rolloff**k * sin(k * phase), in closed form.

    One sin and one cos per sample instead of one per harmonic; with rolloff <= 0.9 the
    harmonics above Nyquist are small, and callers band-limit the result anyway.
    """
    a = np.float32(rolloff)
    return a * np.sin(phase) / (np.float32(1.0 + rolloff * rolloff) - 2.0 * a * np.cos(phase))


def _noise(rng: np.random.Generator, n: int) -> np.ndarray:
    return rng.standard_normal(n, dtype=np.float32)


@lru_cache(maxsize=256)
def _butter_sos(rate_hz: int, low_hz: float | None, high_hz: float | None, order: int) -> np.ndarray | None:
    nyq = rate_hz / 2.0
    lo = low_hz if low_hz and low_hz < nyq * 0.95 else None
    hi = high_hz if high_hz and high_hz < nyq * 0.95 else None
    if lo and hi:
        return signal.butter(order, [lo, hi], btype="bandpass", fs=rate_hz, output="sos")
    if lo:
        return signal.butter(order, lo, btype="highpass", fs=rate_hz, output="sos")
    if hi:
        return signal.butter(order, hi, btype="lowpass", fs=rate_hz, output="sos")
    return None


def _band(
    x: np.ndarray, rate_hz: int, low_hz: float | None, high_hz: float | None, order: int = 2
) -> np.ndarray:
    """Butterworth band/low/high pass; edges beyond Nyquist are dropped."""
    sos = _butter_sos(rate_hz, low_hz, high_hz, order)
    return x if sos is None else signal.sosfilt(sos, x)


@lru_cache(maxsize=256)
def _peak_sos(rate_hz: int, centres_hz: tuple[float, ...], q: float) -> np.ndarray | None:
    sections = [np.concatenate(signal.iirpeak(fc, q, fs=rate_hz)) for fc in centres_hz if fc < rate_hz * 0.45]
    return np.array(sections) if sections else None


def _resonate(x: np.ndarray, rate_hz: int, centres_hz: tuple[float, ...], q: float = 6.0) -> np.ndarray:
    """Cascade of second-order peaks (formants or body resonances) below Nyquist.

    A cascade rather than a parallel bank: one filter call, and the peaks' relative levels
    fall out of the cascade as in a cascade formant synthesiser.
    """
    sos = _peak_sos(rate_hz, tuple(centres_hz), q)
    return x if sos is None else signal.sosfilt(sos, x)


def _segment_env(
    n: int, rate_hz: int, starts_s: np.ndarray, lengths_s: np.ndarray, attack_s: float, release_s: float
) -> np.ndarray:
    """Sum of trapezoid envelopes, one per (start, length), with linear attack and release."""
    env = np.zeros(n, dtype=np.float32)
    for start, length in zip(starts_s, lengths_s, strict=True):
        i0, i1 = max(0, int(start * rate_hz)), min(n, int((start + length) * rate_hz))
        if i1 <= i0:
            continue
        local = (np.arange(i0, i1) / rate_hz - start).astype(np.float32)
        env[i0:i1] += np.clip(np.minimum(local / attack_s, (length - local) / release_s), 0.0, 1.0)
    return env


def _decays(
    n: int,
    rate_hz: int,
    onsets_s: np.ndarray,
    taus_s: np.ndarray,
    amps: np.ndarray,
    freqs_hz: np.ndarray | None = None,
) -> np.ndarray:
    """Sum of exponentially decaying partials (or bare decays if no frequencies), vectorised.

    Each decay is cut after six time constants (-52 dB).
    """
    onsets_s, taus_s, amps = np.asarray(onsets_s), np.asarray(taus_s), np.asarray(amps)
    if n == 0 or onsets_s.size == 0:
        return np.zeros(n, dtype=np.float32)
    m = int(np.max(taus_s) * 6.0 * rate_hz) + 1
    local = (np.arange(m, dtype=np.float32) / np.float32(rate_hz))[None, :]
    pieces = (amps[:, None] * np.exp(-local / taus_s[:, None])).astype(np.float32)
    if freqs_hz is not None:
        pieces *= np.sin((2.0 * np.pi * np.asarray(freqs_hz)[:, None]).astype(np.float32) * local)
    idx = (onsets_s * rate_hz).astype(np.int64)[:, None] + np.arange(m)[None, :]
    keep = idx < n
    return np.bincount(idx[keep], weights=pieces[keep], minlength=n).astype(np.float32)


def _pink(n: int, rng: np.random.Generator) -> np.ndarray:
    """Pink-ish (about 1/f power) noise with unit RMS.

    Three-pole, three-zero approximation of a -3 dB/octave filter, as given on J. O. Smith's
    CCRMA pages (coefficients from memory); it is close to pink over the audio band.
    """
    b = [0.049922035, -0.095993537, 0.050612699, -0.004408786]
    a = [1.0, -2.494956002, 2.017265875, -0.522189400]
    x = signal.lfilter(b, a, _noise(rng, n + 2000))[2000:]  # drop the start-up transient
    rms = float(np.sqrt(np.mean(x * x))) if n else 0.0
    return x / rms if rms > 0 else x


def _finish(x: np.ndarray, peak: float = 0.5) -> np.ndarray:
    """Scale to the given peak (silence stays silent) and return float32."""
    m = float(np.max(np.abs(x))) if x.size else 0.0
    if m > 0:
        x = x * (peak / m)
    return np.clip(x, -1.0, 1.0).astype(np.float32)


def _rms_dbfs(x: np.ndarray) -> float:
    r = float(np.sqrt(np.mean(np.asarray(x, dtype=np.float64) ** 2))) if x.size else 0.0
    return 20.0 * np.log10(r) if r > 0 else -np.inf


# ---------------------------------------------------------------------------------------
# Sounds the detectors are meant to find


def _bursts(
    rng: np.random.Generator, duration_s: float, length_s: tuple[float, float], gap_s: tuple[float, float]
) -> tuple[np.ndarray, np.ndarray]:
    """Start times and lengths of bursts separated by gaps, from t = 0 to the end."""
    starts, lengths, t0 = [], [], 0.0
    while t0 < duration_s:
        length = rng.uniform(*length_s)
        starts.append(t0)
        lengths.append(length)
        t0 += length + rng.uniform(*gap_s)
    return np.array(starts), np.array(lengths)


def _arches(
    n: int,
    rate_hz: int,
    starts_s: np.ndarray,
    lengths_s: np.ndarray,
    base_hz: np.ndarray,
    lift_hz: np.ndarray,
    rest_hz: float,
) -> np.ndarray:
    """A pitch contour: within each burst base + lift * sin(pi * u), u from 0 to 1; rest_hz between."""
    f = np.full(n, rest_hz)
    for start, length, base, lift in zip(starts_s, lengths_s, base_hz, lift_hz, strict=True):
        i0, i1 = max(0, int(start * rate_hz)), min(n, int((start + length) * rate_hz))
        if i1 > i0:
            u = (np.arange(i0, i1) / rate_hz - start) / length
            f[i0:i1] = base + lift * np.sin(np.pi * u)
    return f


@_sound
def smoke_alarm_t3(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Temporal-three alarm: 0.5 s on / 0.5 s off three times, the third off phase 1.5 s.

    ISO 8201 pattern: a 4.0 s cycle with pulses starting at 0, 1 and 2 s. The tone is a
    piezo-like ~3.1 kHz tone with a weak second harmonic where it fits below Nyquist
    (common practice: residential alarms sound near 3 kHz).
    """
    n = int(round(rate_hz * duration_s))
    t = np.arange(n) / rate_hz
    cycle = np.mod(t, 4.0)
    in_pulse = np.mod(cycle, 1.0)
    on = np.flatnonzero((cycle < 3.0) & (in_pulse < 0.5))
    f0 = 3100.0 + rng.uniform(-60.0, 60.0)
    theta = (2.0 * np.pi * np.mod(f0 * t[on], 1.0)).astype(np.float32)
    tone = np.sin(theta)
    if 2.0 * f0 < 0.45 * rate_hz:
        tone += 0.15 * np.sin(2.0 * theta)
    # 4 ms linear edges: no clicks, and well inside the +/-10 % phase tolerance.
    ramp = np.clip(np.minimum(in_pulse[on], 0.5 - in_pulse[on]) / 0.004, 0.0, 1.0)
    out = np.zeros(n, dtype=np.float32)
    out[on] = tone * ramp
    return _finish(out, 0.7)


@_sound
def baby_cry(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Infant cry: ~1 s voiced bursts, f0 arching within 350-550 Hz with vibrato, breaths between."""
    n = int(round(rate_hz * duration_s))
    starts, lengths = _bursts(rng, duration_s, (0.8, 1.3), (0.35, 0.6))
    f0 = _arches(
        n,
        rate_hz,
        starts,
        lengths,
        rng.uniform(390.0, 440.0, len(starts)),
        rng.uniform(50.0, 90.0, len(starts)),
        420.0,
    )
    t = np.arange(n, dtype=np.float32) / np.float32(rate_hz)
    f0 = np.clip(f0 * (1.0 + 0.025 * np.sin(2.0 * np.pi * rng.uniform(5.0, 7.0) * t)), 355.0, 545.0)
    voiced = _harmonic(_phase(f0, rate_hz, n), 0.8)
    voiced = voiced + 2.0 * _resonate(voiced, rate_hz, (1100.0, 2500.0), q=2.0)  # vocal tract
    voiced += 0.05 * _noise(rng, n)  # breathiness
    env = _segment_env(n, rate_hz, starts, lengths, 0.06, 0.12)
    breath = _band(_noise(rng, n), rate_hz, 800.0, 3000.0)
    breath_env = _segment_env(n, rate_hz, starts + lengths + 0.05, np.full(len(starts), 0.25), 0.08, 0.1)
    return _finish(_band(voiced * env + 0.04 * breath * breath_env, rate_hz, 150.0, 7000.0), 0.6)


@_sound
def glass_break(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Breaking glass: a bright broadband crack, then decaying tinkles resonating at 3-7 kHz."""
    n = int(round(rate_hz * duration_s))
    crack_env = _decays(n, rate_hz, np.array([0.0, 0.012]), np.array([0.012, 0.02]), np.array([1.0, 0.6]))
    crack = _band(_noise(rng, n), rate_hz, 1500.0, None) * crack_env
    count = int(rng.integers(30, 45))
    onsets = np.sort(0.01 + rng.exponential(0.25, count))
    freqs = rng.uniform(3000.0, min(7000.0, 0.45 * rate_hz), count)
    amps = rng.uniform(0.15, 0.6, count) * np.exp(-onsets / 0.6)
    tinkles = _decays(n, rate_hz, onsets, rng.uniform(0.015, 0.06, count), amps, freqs)
    # Falling shards: short bright noise ticks.
    ticks_env = _decays(
        n, rate_hz, np.sort(rng.uniform(0.05, 1.2, 20)), np.full(20, 0.004), rng.uniform(0.1, 0.4, 20)
    )
    ticks = _band(_noise(rng, n), rate_hz, 2500.0, None) * ticks_env
    return _finish(crack + tinkles + ticks, 0.8)


# ---------------------------------------------------------------------------------------
# Household sounds that cause false alarms


@_sound
def dog_bark(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Barks: short, harsh, falling-pitch bursts in groups of two to four."""
    n = int(round(rate_hz * duration_s))
    onsets: list[float] = []
    t0 = 0.0
    while t0 < duration_s:
        for _ in range(int(rng.integers(2, 5))):
            onsets.append(t0)
            t0 += rng.uniform(0.3, 0.45)
        t0 += rng.uniform(1.0, 2.0)
    starts = np.array(onsets)
    lengths = rng.uniform(0.12, 0.22, len(onsets))
    # Pitch falls through each bark: an arch's second half.
    f0 = _arches(
        n,
        rate_hz,
        starts - lengths,
        2.0 * lengths,
        rng.uniform(250.0, 320.0, len(onsets)),
        rng.uniform(280.0, 380.0, len(onsets)),
        300.0,
    )
    voiced = _harmonic(_phase(f0, rate_hz, n), 0.75)
    body = voiced + 2.0 * _resonate(voiced, rate_hz, (900.0, 1800.0), q=2.5)
    rough = _band(_noise(rng, n), rate_hz, 300.0, 3500.0)
    env = _segment_env(n, rate_hz, starts, lengths, 0.008, 0.09)
    return _finish((body + 0.6 * rough) * env, 0.7)


@_sound
def bird_screech(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Parrot-like screech: harsh harmonic calls with an arched contour (cry-like on purpose)."""
    n = int(round(rate_hz * duration_s))
    starts, lengths = _bursts(rng, duration_s, (0.4, 0.8), (0.4, 1.2))
    f0 = _arches(
        n,
        rate_hz,
        starts,
        lengths,
        rng.uniform(650.0, 800.0, len(starts)),
        rng.uniform(150.0, 300.0, len(starts)),
        800.0,
    )
    # Irregular frequency jitter below 60 Hz and ~110 Hz amplitude roughness make it harsh.
    jitter = _band(_noise(rng, n), rate_hz, None, 60.0)
    jitter /= np.max(np.abs(jitter)) or 1.0
    voiced = _harmonic(_phase(f0 * (1.0 + 0.04 * jitter), rate_hz, n), 0.85)
    t = np.arange(n, dtype=np.float32) / np.float32(rate_hz)
    x = voiced * (1.0 + 0.7 * np.sin(2.0 * np.pi * rng.uniform(90.0, 130.0) * t))
    x = x + 2.0 * _resonate(x, rate_hz, (2000.0, 3200.0), q=2.0)
    x += 0.3 * _band(_noise(rng, n), rate_hz, 1500.0, 6000.0)
    env = _segment_env(n, rate_hz, starts, lengths, 0.03, 0.08)
    return _finish(_band(x * env, rate_hz, 300.0, None), 0.7)


# Vowel formants (F1, F2, F3) in Hz, adult speech, rounded (common textbook values, from memory).
_VOWELS = (
    (730.0, 1090.0, 2440.0),
    (270.0, 2290.0, 3010.0),
    (530.0, 1840.0, 2480.0),
    (570.0, 840.0, 2410.0),
    (300.0, 870.0, 2240.0),
)


@_sound
def tv_babble(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Speech from a TV: two talkers (a low and a high voice) taking turns, phrase by phrase.

    A glottal pulse train goes through one vowel's formants per syllable (~5 syllables a
    second, each with a raised-sine envelope, some opening with a fricative hiss), band-limited
    like a small loudspeaker.
    """
    n = int(round(rate_hz * duration_s))
    phrase_starts, phrase_lengths = _bursts(rng, duration_s, (1.2, 3.0), (0.25, 0.7))
    voices = (rng.uniform(105.0, 130.0), rng.uniform(190.0, 230.0))
    first = int(rng.integers(0, 2))
    f0 = np.full(n, voices[first])
    for k, (start, length) in enumerate(zip(phrase_starts, phrase_lengths, strict=True)):
        i0, i1 = int(start * rate_hz), min(n, int((start + length + 0.7) * rate_hz))
        f0[i0:i1] = voices[(first + k) % 2]
    t = np.arange(n, dtype=np.float32) / np.float32(rate_hz)
    f0 = f0 * (1.0 + 0.12 * np.sin(2.0 * np.pi * rng.uniform(0.2, 0.5) * t))  # intonation
    pulses = _harmonic(_phase(f0, rate_hz, n), 0.9)
    fricative = _band(_noise(rng, n), rate_hz, 3000.0, 7000.0)
    syll_len = rng.uniform(0.16, 0.3, int(duration_s * 6) + 2)
    bounds = np.minimum((np.concatenate([[0.0], np.cumsum(syll_len)]) * rate_hz).astype(int), n)
    vowel = rng.integers(0, len(_VOWELS), len(syll_len))
    opens_with_hiss = rng.random(len(syll_len)) < 0.4
    speech = np.zeros(n, dtype=np.float32)
    hiss = np.zeros(n, dtype=np.float32)
    for k in range(len(syll_len)):
        i0, i1 = bounds[k], bounds[k + 1]
        if i1 <= i0:
            break
        # Each syllable's filter starts from rest; the envelope hides the start-up.
        env = np.sin(np.linspace(0.0, np.pi, i1 - i0, dtype=np.float32)) ** 2
        speech[i0:i1] = _resonate(pulses[i0:i1], rate_hz, _VOWELS[vowel[k]], q=5.0) * env
        if opens_with_hiss[k]:
            m = (i1 - i0) // 5
            hiss[i0 : i0 + m] = fricative[i0 : i0 + m] * np.hanning(m)
    speech /= float(np.sqrt(np.mean(speech * speech))) or 1.0
    hiss /= float(np.sqrt(np.mean(hiss * hiss))) or 1.0
    phrase = _segment_env(n, rate_hz, phrase_starts, phrase_lengths, 0.05, 0.1)
    return _finish(_band((speech + 0.12 * hiss) * phrase, rate_hz, 120.0, 6500.0), 0.5)


@_sound
def vacuum(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Vacuum cleaner: broadband motor noise, a motor hum and a wavering whistle."""
    n = int(round(rate_hz * duration_s))
    t = np.arange(n) / rate_hz
    noise = _band(_noise(rng, n), rate_hz, 200.0, 5000.0)
    hum = _harmonic(_phase(rng.uniform(180.0, 240.0), rate_hz, n), 0.6)
    whistle_hz = rng.uniform(3800.0, 4600.0) * (1.0 + 0.004 * np.sin(2.0 * np.pi * 0.7 * t))
    whistle = np.sin(_phase(whistle_hz, rate_hz, n))
    spin_up = np.clip(t / 0.4, 0.0, 1.0)
    return _finish((noise + 0.3 * hum + 0.35 * whistle) * spin_up, 0.5)


@_sound
def door_slam(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Door slam: a broadband click, a low decaying thump and a short rattle."""
    n = int(round(rate_hz * duration_s))
    click = _band(_noise(rng, n), rate_hz, 500.0, None) * _decays(
        n, rate_hz, np.array([0.0]), np.array([0.006]), np.array([1.0])
    )
    thump = _decays(
        n,
        rate_hz,
        np.zeros(2),
        np.array([0.15, 0.08]),
        np.array([1.0, 0.5]),
        np.array([rng.uniform(60.0, 90.0), rng.uniform(140.0, 200.0)]),
    )
    rattle = _decays(
        n,
        rate_hz,
        0.02 + np.sort(rng.uniform(0.0, 0.25, 8)),
        np.full(8, 0.01),
        rng.uniform(0.1, 0.3, 8),
        rng.uniform(600.0, 1500.0, 8),
    )
    return _finish(0.8 * click + thump + rattle, 0.9)


@_sound
def kettle_rumble(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Electric kettle coming to the boil: rising low rumble, bubbling, then a hiss."""
    n = int(round(rate_hz * duration_s))
    u = np.arange(n, dtype=np.float32) / np.float32(max(n, 1))
    rumble = _band(_noise(rng, n), rate_hz, 40.0, 400.0) * (0.3 + 0.7 * u)
    count = int(40 * duration_s)
    bubbles = _decays(
        n,
        rate_hz,
        np.sort(rng.uniform(0.0, duration_s, count)),
        np.full(count, 0.008),
        rng.uniform(0.05, 0.3, count),
        rng.uniform(300.0, 1200.0, count),
    )
    hiss = _band(_noise(rng, n), rate_hz, 2000.0, 6000.0) * u**2
    return _finish(rumble + bubbles * (0.2 + u) + 0.25 * hiss, 0.5)


@_sound
def piano(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """A few piano-like notes, one every 0.4-0.8 s: bright partials fading fast over a mellow tail."""
    n = int(round(rate_hz * duration_s))
    semitones = np.array([0, 2, 4, 5, 7, 9, 11, 12])  # a C major scale from middle C (261.63 Hz)
    count = max(1, int(duration_s / 0.6))
    onsets = np.cumsum(np.concatenate([[0.0], rng.uniform(0.4, 0.8, count - 1)]))
    notes = rng.choice(semitones, count)
    note_len = min(n, int(2.5 * rate_hz))
    tt = np.arange(note_len) / rate_hz
    decay_fast = np.exp(-tt / 0.25).astype(np.float32)
    decay_slow = np.exp(-tt / 1.2).astype(np.float32)
    out = np.zeros(n, dtype=np.float32)
    templates: dict[int, np.ndarray] = {}  # one synthesis per pitch, reused for repeats
    for onset, note in zip(onsets, notes, strict=True):
        if note not in templates:
            f = 261.63 * 2.0 ** (note / 12.0)
            phase = (2.0 * np.pi * np.mod(f * tt, 1.0)).astype(np.float32)
            templates[note] = _harmonic(phase, 0.7) * decay_fast + 0.8 * _harmonic(phase, 0.35) * decay_slow
        i0 = int(onset * rate_hz)
        if i0 < n:
            m = min(note_len, n - i0)
            out[i0 : i0 + m] += rng.uniform(0.6, 1.0) * templates[note][:m]
    hammer = _band(_noise(rng, n), rate_hz, 1000.0, None) * _decays(
        n, rate_hz, onsets, np.full(count, 0.003), np.full(count, 0.3)
    )
    return _finish(_band(out + hammer, rate_hz, None, 6000.0), 0.6)


@_sound
def traffic(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Road traffic through a window: steady low rumble plus vehicles swelling past."""
    n = int(round(rate_hz * duration_s))
    t = np.arange(n, dtype=np.float32) / np.float32(rate_hz)
    rumble = _band(_noise(rng, n), rate_hz, 25.0, 250.0)
    swell = np.zeros(n, dtype=np.float32)
    for centre in rng.uniform(-1.0, duration_s + 1.0, max(1, int(duration_s / 3.0) + 1)):
        swell += np.exp(-0.5 * ((t - np.float32(centre)) / np.float32(rng.uniform(0.8, 1.8))) ** 2)
    tyres = _band(_noise(rng, n), rate_hz, 60.0, 700.0)
    engine = _harmonic(_phase(rng.uniform(60.0, 90.0) * (1.0 + 0.1 * swell), rate_hz, n), 0.5)
    return _finish(rumble + (1.5 * tyres + 0.4 * engine) * swell, 0.5)


@_sound
def drill(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Hammer drill through a wall: motor whine with hammer blows, in bursts of 1-3 s."""
    n = int(round(rate_hz * duration_s))
    t = np.arange(n, dtype=np.float32) / np.float32(rate_hz)
    motor_hz = rng.uniform(170.0, 230.0) * (1.0 + 0.02 * np.sin(2.0 * np.pi * 1.3 * t))
    motor = _harmonic(_phase(motor_hz, rate_hz, n), 0.8)
    since_blow = np.mod(t * np.float32(rng.uniform(35.0, 50.0)), 1.0)
    blows = np.exp(-since_blow / 0.12) * _band(_noise(rng, n), rate_hz, 400.0, 5000.0)
    starts, lengths = _bursts(rng, duration_s, (1.0, 3.0), (0.5, 1.5))
    env = _segment_env(n, rate_hz, starts, lengths, 0.15, 0.2)
    return _finish((0.6 * motor + blows) * env, 0.6)


@_sound
def room_tone(rate_hz: int, duration_s: float, rng: np.random.Generator) -> np.ndarray:
    """Quiet room: pink-ish noise with the top rolled off above 5 kHz, at -55 dBFS RMS."""
    n = int(round(rate_hz * duration_s))
    x = _band(_pink(n, rng), rate_hz, None, 5000.0)
    rms = float(np.sqrt(np.mean(x * x))) if n else 0.0
    if rms > 0:
        x = x * (10.0 ** (ROOM_TONE_DBFS / 20.0) / rms)
    return np.clip(x, -1.0, 1.0).astype(np.float32)


SOUNDS: dict[str, Generator] = {
    "smoke_alarm_t3": smoke_alarm_t3,
    "baby_cry": baby_cry,
    "glass_break": glass_break,
    "dog_bark": dog_bark,
    "bird_screech": bird_screech,
    "tv_babble": tv_babble,
    "vacuum": vacuum,
    "door_slam": door_slam,
    "kettle_rumble": kettle_rumble,
    "piano": piano,
    "traffic": traffic,
    "drill": drill,
    "room_tone": room_tone,
}


# ---------------------------------------------------------------------------------------
# Clips


def _active_rms_dbfs(x: np.ndarray, rate_hz: int) -> float:
    """RMS over the 20 ms frames within 30 dB of the loudest: the level while the sound is on."""
    frame = max(1, rate_hz // 50)
    m = len(x) // frame
    if m == 0:
        return _rms_dbfs(x)
    power = np.mean(np.asarray(x[: m * frame], dtype=np.float64).reshape(m, frame) ** 2, axis=1)
    if not np.any(power > 0):
        return -np.inf
    active = power[power >= power.max() * 1e-3]
    return float(10.0 * np.log10(np.mean(active)))


def mix(
    event: np.ndarray,
    rate_hz: int,
    rng: np.random.Generator,
    snr_db: float = 30.0,
    room_level_dbfs: float = ROOM_TONE_DBFS,
) -> np.ndarray:
    """Event plus room tone: room tone at ``room_level_dbfs`` RMS, the event ``snr_db`` above it.

    The event's level is its RMS while it sounds (see ``_active_rms_dbfs``), so gaps between
    pulses do not lower it. If the sum would clip, the whole mix is turned down, which keeps
    the SNR. Returns float32 in [-1, 1].
    """
    n = len(event)
    room = room_tone(rate_hz, n / rate_hz, rng).astype(np.float64)
    room *= 10.0 ** ((room_level_dbfs - ROOM_TONE_DBFS) / 20.0)
    out = room
    level = _active_rms_dbfs(event, rate_hz)
    if np.isfinite(level):
        gain = 10.0 ** ((room_level_dbfs + snr_db - level) / 20.0)
        out = room + gain * np.asarray(event, dtype=np.float64)
    peak = float(np.max(np.abs(out))) if n else 0.0
    if peak > 0.98:
        out = out * (0.98 / peak)
    return out.astype(np.float32)


def to_wav_bytes(samples: np.ndarray, rate_hz: int, subtype: str = "PCM_16") -> bytes:
    """A standard RIFF/WAVE file (libsndfile; canonical 44-byte header for PCM_16 mono)."""
    buf = io.BytesIO()
    data = np.clip(np.asarray(samples, dtype=np.float32), -1.0, 1.0)
    sf.write(buf, data, rate_hz, format="WAV", subtype=subtype)
    return buf.getvalue()


# Event level above the room tone, in dB: our own choice for the simulator, not measured.
# Alarms are loudest; cries, barks and breakage loud; background sources moderate.
_SNR_RANGE_DB = {
    "smoke_alarm_t3": (35.0, 45.0),
    "baby_cry": (25.0, 40.0),
    "glass_break": (25.0, 40.0),
    "dog_bark": (25.0, 40.0),
    "bird_screech": (25.0, 40.0),
    "door_slam": (25.0, 40.0),
}
_DEFAULT_SNR_RANGE_DB = (15.0, 30.0)


def make_clip(
    kind: str,
    *,
    rate_hz: int = 16000,
    duration_s: float = 10.0,
    rng: np.random.Generator,
    event_at_s: float | None = None,
    snr_db: float | None = None,
) -> tuple[bytes, float]:
    """A PCM16 mono WAV clip of ``kind`` in room tone, and the offset (s) where the event starts.

    ``event_at_s=None`` picks an offset: 0 for sounds already going on (``CONTINUOUS_KINDS``),
    otherwise a random one in the first third of the clip (at least 0.5 s in). The offset is
    rounded to a whole sample and returned as used. ``snr_db=None`` draws a typical level.
    """
    if kind not in SOUNDS:
        raise KeyError(f"unknown sound kind {kind!r}; known: {', '.join(sorted(SOUNDS))}")
    n = int(round(rate_hz * duration_s))
    if event_at_s is None:
        event_at_s = 0.0 if kind in CONTINUOUS_KINDS else rng.uniform(0.5, max(0.5, duration_s / 3.0))
    start = min(n, max(0, int(round(event_at_s * rate_hz))))
    if snr_db is None:
        snr_db = float(rng.uniform(*_SNR_RANGE_DB.get(kind, _DEFAULT_SNR_RANGE_DB)))
    event = np.zeros(n)
    if kind != "room_tone":  # room tone alone is the mix with no event
        event[start:] = SOUNDS[kind](rate_hz, (n - start) / rate_hz, rng)[: n - start]
    samples = mix(event, rate_hz, rng, snr_db=snr_db)
    return to_wav_bytes(samples, rate_hz), start / rate_hz
