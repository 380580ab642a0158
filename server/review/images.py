"""Waveform and spectrogram images of a clip, computed with numpy and encoded as PNG.

Pure functions over decoded mono samples; no database or files. The page draws the axes
and the detection marker from ``ImageMeta``.
"""

from __future__ import annotations

import io
import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from PIL import Image

# Our own ramp from quiet to loud: ink blue, slate, sea green, ochre, paper white.
_RAMP_STOPS = (
    (0.00, (14, 16, 34)),
    (0.30, (44, 62, 118)),
    (0.55, (32, 138, 128)),
    (0.80, (226, 184, 78)),
    (1.00, (252, 248, 232)),
)
WAVE_BACKGROUND = (246, 246, 242)
WAVE_INK = (38, 70, 110)


def _ramp_palette() -> list[int]:
    pos = np.array([p for p, _ in _RAMP_STOPS])
    cols = np.array([c for _, c in _RAMP_STOPS], dtype=float)
    x = np.linspace(0.0, 1.0, 256)
    rgb = np.stack([np.interp(x, pos, cols[:, i]) for i in range(3)], axis=1)
    return [int(round(v)) for v in rgb.reshape(-1)]


_PALETTE = _ramp_palette()


@dataclass(frozen=True)
class Spectrogram:
    """Log-magnitude STFT: ``db[f, t]`` in dB relative to the loudest cell, clamped at -range."""

    db: np.ndarray
    freqs_hz: np.ndarray
    times_s: np.ndarray
    rate_hz: int
    n_fft: int
    hop: int
    dynamic_range_db: float


def default_n_fft(rate_hz: int) -> int:
    """A window of about 32 ms rounded to a power of two (512 points at 16 kHz)."""
    return int(2 ** max(6, round(math.log2(0.032 * rate_hz))))


def spectrogram_db(
    samples: np.ndarray,
    rate_hz: int,
    *,
    n_fft: int | None = None,
    overlap: float = 0.75,
    dynamic_range_db: float = 80.0,
) -> Spectrogram:
    """Short-time Fourier transform with a Hann window, as dB relative to the maximum.

    Frame ``i`` is centred on the middle of samples [i*hop, (i+1)*hop), with zeros beyond the
    ends, so column ``i`` stands for exactly that stretch of time and the columns together
    span 0 to ``n_frames * hop / rate`` seconds. Power below 1e-12 (digital silence) is
    treated as the floor, so a silent clip is uniformly at -``dynamic_range_db``.
    """
    if rate_hz <= 0:
        raise ValueError("rate_hz must be positive")
    if not 0.0 <= overlap < 1.0:
        raise ValueError("overlap must lie in [0, 1)")
    x = np.asarray(samples, dtype=np.float32).reshape(-1)
    n_fft = n_fft or default_n_fft(rate_hz)
    hop = max(1, int(round(n_fft * (1.0 - overlap))))
    n_frames = max(1, math.ceil(x.size / hop))
    left = (n_fft - hop) // 2
    total = (n_frames - 1) * hop + n_fft
    padded = np.zeros(total, dtype=np.float32)
    take = min(x.size, total - left)
    padded[left : left + take] = x[:take]
    frames = sliding_window_view(padded, n_fft)[::hop][:n_frames]
    window = np.hanning(n_fft + 1)[:-1].astype(np.float32)  # periodic Hann
    spec = np.fft.rfft(frames * window, axis=1)
    power = (spec.real**2 + spec.imag**2).astype(np.float32)
    floor = np.float32(1e-12)
    ref = max(float(power.max()), float(floor))
    db = 10.0 * np.log10(np.maximum(power, floor) / ref)
    np.clip(db, -dynamic_range_db, 0.0, out=db)
    freqs = np.arange(n_fft // 2 + 1) * (rate_hz / n_fft)
    times = (np.arange(n_frames) + 0.5) * hop / rate_hz
    return Spectrogram(db.T.astype(np.float32), freqs, times, rate_hz, n_fft, hop, dynamic_range_db)


def waveform_envelope(samples: np.ndarray, width: int) -> tuple[np.ndarray, np.ndarray]:
    """Minimum and maximum sample in each of ``width`` equal pixel columns (zeros if empty)."""
    if width < 1:
        raise ValueError("width must be at least 1")
    x = np.asarray(samples, dtype=np.float32).reshape(-1)
    if x.size == 0:
        return np.zeros(width, np.float32), np.zeros(width, np.float32)
    edges = np.linspace(0, x.size, width + 1).astype(np.int64)
    starts = np.minimum(edges[:-1], x.size - 1)
    # reduceat needs increasing starts; a column narrower than one sample repeats its neighbour.
    mins = np.minimum.reduceat(x, starts)
    maxs = np.maximum.reduceat(x, starts)
    narrow = edges[1:] <= edges[:-1]
    mins[narrow] = x[starts[narrow]]
    maxs[narrow] = x[starts[narrow]]
    return mins, maxs


@dataclass(frozen=True)
class ImageMeta:
    """What the page needs to label the axes and place the detection marker.

    ``time_extent_s`` is the time at the left and right edges of the spectrogram (the waveform
    spans 0 to ``duration_s``; the two differ by under one hop); ``freq_extent_khz`` the
    frequency at the bottom and top edges of the spectrogram (half a bin beyond 0 and Nyquist,
    because each row is one frequency bin). Tick lists give values in seconds and kHz.
    """

    duration_s: float
    rate_hz: int
    nyquist_khz: float
    time_extent_s: tuple[float, float]
    freq_extent_khz: tuple[float, float]
    time_ticks_s: list[float]
    freq_ticks_khz: list[float]
    spectrogram_size: tuple[int, int]
    waveform_size: tuple[int, int]
    waveform_scale: float
    peak_dbfs: float | None
    n_fft: int
    hop: int
    dynamic_range_db: float
    version: int = field(default=1)

    def to_json(self) -> dict[str, Any]:
        d = asdict(self)
        for k in ("time_extent_s", "freq_extent_khz", "spectrogram_size", "waveform_size"):
            d[k] = list(d[k])
        return d

    @classmethod
    def from_json(cls, d: dict[str, Any]) -> ImageMeta:
        d = dict(d)
        for k in ("time_extent_s", "freq_extent_khz", "spectrogram_size", "waveform_size"):
            d[k] = tuple(d[k])
        return cls(**d)

    def x_fraction(self, t_s: float) -> float:
        """Horizontal position (0 = left edge, 1 = right) of time ``t_s``."""
        lo, hi = self.time_extent_s
        return (t_s - lo) / (hi - lo)

    def y_fraction(self, f_khz: float) -> float:
        """Vertical position (0 = bottom edge, 1 = top) of frequency ``f_khz``."""
        lo, hi = self.freq_extent_khz
        return (f_khz - lo) / (hi - lo)


@dataclass(frozen=True)
class ClipImages:
    waveform_png: bytes
    spectrogram_png: bytes
    meta: ImageMeta


def nice_ticks(upper: float, max_ticks: int = 10) -> list[float]:
    """Round tick values from 0 to ``upper`` with a 1, 2 or 5 step, at most ``max_ticks`` + 1."""
    if upper <= 0:
        return [0.0]
    raw = upper / max_ticks
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 5, 10) if m * mag >= raw)
    n = int(math.floor(upper / step + 1e-9))
    return [float(round(i * step, 10)) for i in range(n + 1)]


def _png(img: Image.Image) -> bytes:
    buf = io.BytesIO()
    # Low compression: these are computed often and live in a local cache.
    img.save(buf, format="PNG", compress_level=1)
    return buf.getvalue()


def spectrogram_image(spec: Spectrogram) -> Image.Image:
    """Palette image, low frequencies at the bottom, one pixel per bin and frame."""
    scaled = (spec.db + spec.dynamic_range_db) * (255.0 / spec.dynamic_range_db)
    idx = np.clip(np.rint(scaled), 0, 255).astype(np.uint8)[::-1]
    img = Image.fromarray(np.ascontiguousarray(idx), mode="L").convert("P")
    img.putpalette(_PALETTE)
    return img


def waveform_image(mins: np.ndarray, maxs: np.ndarray, height: int, scale: float) -> Image.Image:
    """Two-colour image: for each column, ink from the minimum to the maximum sample.

    Amplitudes are divided by ``scale`` (1.0 = full scale at the top and bottom edges); a
    column always inks at least its centre row, so silence draws a flat line.
    """
    if height < 3:
        raise ValueError("height must be at least 3")
    half = (height - 1) / 2.0
    top = np.rint(half - np.clip(maxs / scale, -1, 1) * half).astype(np.int64)
    bottom = np.rint(half - np.clip(mins / scale, -1, 1) * half).astype(np.int64)
    rows = np.arange(height)[:, None]
    ink = (rows >= top[None, :]) & (rows <= bottom[None, :])
    img = Image.fromarray(ink.astype(np.uint8), mode="L").convert("P")
    img.putpalette(list(WAVE_BACKGROUND) + list(WAVE_INK) + [0, 0, 0] * 254)
    return img


def render_clip_images(
    samples: np.ndarray,
    rate_hz: int,
    *,
    waveform_width: int = 1000,
    waveform_height: int = 96,
    dynamic_range_db: float = 80.0,
    n_fft: int | None = None,
    overlap: float = 0.75,
) -> ClipImages:
    """Both images as PNG bytes plus their axis metadata.

    The waveform is scaled to the clip's peak so quiet clips stay visible; ``peak_dbfs``
    (None for digital silence) lets the page say how loud that peak is.
    """
    x = np.asarray(samples, dtype=np.float32).reshape(-1)
    duration = x.size / rate_hz
    spec = spectrogram_db(x, rate_hz, n_fft=n_fft, overlap=overlap, dynamic_range_db=dynamic_range_db)
    spec_img = spectrogram_image(spec)
    mins, maxs = waveform_envelope(x, waveform_width)
    peak = float(max(abs(float(mins.min())), abs(float(maxs.max())))) if x.size else 0.0
    scale = peak if peak > 0 else 1.0
    wave_img = waveform_image(mins, maxs, waveform_height, scale)
    bin_khz = rate_hz / spec.n_fft / 1000.0
    nyquist_khz = rate_hz / 2000.0
    meta = ImageMeta(
        duration_s=duration,
        rate_hz=rate_hz,
        nyquist_khz=nyquist_khz,
        time_extent_s=(0.0, spec.db.shape[1] * spec.hop / rate_hz),
        freq_extent_khz=(-bin_khz / 2, nyquist_khz + bin_khz / 2),
        time_ticks_s=nice_ticks(duration),
        freq_ticks_khz=nice_ticks(nyquist_khz),
        spectrogram_size=spec_img.size,
        waveform_size=wave_img.size,
        waveform_scale=scale,
        peak_dbfs=(20.0 * math.log10(peak)) if peak > 0 else None,
        n_fft=spec.n_fft,
        hop=spec.hop,
        dynamic_range_db=dynamic_range_db,
    )
    return ClipImages(_png(wave_img), _png(spec_img), meta)
