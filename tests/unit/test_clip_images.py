"""Waveform and spectrogram images of a clip, built from numpy test signals."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from server.review import images

RATE = 16000


def _tone(freq_hz: float, seconds: float, amplitude: float = 0.5) -> np.ndarray:
    t = np.arange(int(RATE * seconds)) / RATE
    return (amplitude * np.sin(2 * np.pi * freq_hz * t)).astype(np.float32)


def test_sine_peak_row_sits_at_its_frequency() -> None:
    spec = images.spectrogram_db(_tone(1000.0, 2.0), RATE)
    assert spec.n_fft == 512 and spec.hop == 128  # 75% overlap at 16 kHz
    peak_bin = int(np.argmax(spec.db.mean(axis=1)))
    bin_hz = RATE / spec.n_fft
    assert abs(spec.freqs_hz[peak_bin] - 1000.0) <= bin_hz / 2
    assert spec.freqs_hz[-1] == pytest.approx(RATE / 2)
    assert spec.db.max() == 0.0 and spec.db.min() >= -80.0


def test_sine_peak_row_in_png_maps_to_1_khz_through_meta() -> None:
    out = images.render_clip_images(_tone(1000.0, 3.0), RATE)
    img = Image.open(io.BytesIO(out.spectrogram_png)).convert("L")
    arr = np.asarray(img, dtype=float)
    brightest_row = int(np.argmax(arr.mean(axis=1)))
    height = arr.shape[0]
    # Row 0 is the top edge; the meta gives the frequency at the bottom and top edges.
    y_from_bottom = (height - brightest_row - 0.5) / height
    lo, hi = out.meta.freq_extent_khz
    khz = lo + y_from_bottom * (hi - lo)
    assert khz == pytest.approx(1.0, abs=RATE / 512 / 2000)
    assert out.meta.y_fraction(khz) == pytest.approx(y_from_bottom)


def test_tone_in_second_half_shows_energy_only_there() -> None:
    x = np.concatenate([np.zeros(RATE * 5, np.float32), _tone(2500.0, 5.0)])
    spec = images.spectrogram_db(x, RATE)
    frame_energy = spec.db.max(axis=0)
    first = spec.times_s < 4.9
    second = spec.times_s > 5.1
    assert frame_energy[first].max() == -80.0  # digital silence sits at the floor
    assert frame_energy[second].min() > -3.0
    band = int(np.argmin(np.abs(spec.freqs_hz - 2500.0)))
    assert spec.db[band, second].mean() > -1.0


def test_pngs_decode_to_expected_sizes() -> None:
    out = images.render_clip_images(_tone(440.0, 10.0), RATE, waveform_width=800, waveform_height=90)
    wave = Image.open(io.BytesIO(out.waveform_png))
    spec = Image.open(io.BytesIO(out.spectrogram_png))
    assert wave.format == "PNG" and spec.format == "PNG"
    assert wave.size == (800, 90) == out.meta.waveform_size
    # 10 s at hop 128 -> 1250 frames; 512-point FFT -> 257 bins.
    assert spec.size == (1250, 257) == out.meta.spectrogram_size


def test_meta_axes_in_seconds_and_khz() -> None:
    out = images.render_clip_images(_tone(440.0, 10.0), RATE)
    m = out.meta
    assert m.duration_s == pytest.approx(10.0)
    assert m.nyquist_khz == pytest.approx(8.0)
    assert m.time_ticks_s == [float(s) for s in range(11)]
    assert m.freq_ticks_khz == [float(k) for k in range(9)]
    assert m.time_extent_s == pytest.approx((0.0, 10.0))
    assert m.x_fraction(2.5) == pytest.approx(0.25)
    assert images.ImageMeta.from_json(m.to_json()) == m
    assert m.peak_dbfs == pytest.approx(20 * np.log10(0.5), abs=0.01)


def test_waveform_envelope_of_silence_is_flat() -> None:
    mins, maxs = images.waveform_envelope(np.zeros(RATE * 2, np.float32), 300)
    assert np.all(mins == 0) and np.all(maxs == 0)
    out = images.render_clip_images(
        np.zeros(RATE * 2, np.float32), RATE, waveform_width=300, waveform_height=61
    )
    ink = np.asarray(Image.open(io.BytesIO(out.waveform_png)).convert("P")) == 1
    # Only the centre row is inked, across every column.
    assert ink[30].all()
    assert ink.sum() == 300
    assert out.meta.peak_dbfs is None


def test_waveform_envelope_tracks_min_and_max_per_column() -> None:
    x = np.zeros(1000, np.float32)
    x[10] = 0.8
    x[990] = -0.4
    mins, maxs = images.waveform_envelope(x, 10)
    assert maxs[0] == pytest.approx(0.8) and mins[0] == 0.0
    assert mins[9] == pytest.approx(-0.4) and maxs[9] == 0.0
    assert np.all(maxs[1:9] == 0) and np.all(mins[1:9] == 0)


def test_waveform_wider_than_clip_still_renders() -> None:
    x = np.array([0.1, -0.2, 0.3], np.float32)
    mins, maxs = images.waveform_envelope(x, 7)
    # Seven columns over three samples: each column shows the sample it falls on.
    expected = x[[0, 0, 0, 1, 1, 2, 2]]
    assert np.array_equal(maxs, expected) and np.array_equal(mins, expected)


def test_loud_tone_reaches_the_edges_of_the_waveform() -> None:
    out = images.render_clip_images(
        _tone(200.0, 1.0, amplitude=0.25), RATE, waveform_width=100, waveform_height=51
    )
    ink = np.asarray(Image.open(io.BytesIO(out.waveform_png)).convert("P")) == 1
    # Scaled to the clip's peak, so a quiet tone still spans top to bottom.
    assert ink[0].any() and ink[-1].any()


def test_nice_ticks() -> None:
    assert images.nice_ticks(8.0) == [0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0]
    assert images.nice_ticks(24.0) == [0.0, 5.0, 10.0, 15.0, 20.0]
    assert images.nice_ticks(0.9) == pytest.approx([0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9])
