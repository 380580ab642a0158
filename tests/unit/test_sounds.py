"""Synthesised sounds: the alarm's temporal pattern and tone, the cry's pitch, clip levels and formats."""

from __future__ import annotations

import struct

import numpy as np
import pytest

from server import sounds
from server.devices.audio import decode_mono, probe

RATE = 16000


def rng(seed: int = 0) -> np.random.Generator:
    return np.random.default_rng(seed)


def pulse_edges(x: np.ndarray, rate: int) -> tuple[np.ndarray, np.ndarray]:
    """Onset and offset times (s) of the loud parts: 5 ms RMS envelope above half its maximum."""
    frame = rate // 200
    m = len(x) // frame
    env = np.sqrt(np.mean(np.asarray(x[: m * frame], dtype=np.float64).reshape(m, frame) ** 2, axis=1))
    on = np.concatenate([[0], (env > 0.5 * env.max()).astype(int), [0]])
    steps = np.diff(on)
    return np.flatnonzero(steps == 1) * frame / rate, np.flatnonzero(steps == -1) * frame / rate


def dominant_hz(x: np.ndarray, rate: int) -> float:
    spectrum = np.abs(np.fft.rfft(x))
    return float(np.fft.rfftfreq(len(x), 1 / rate)[np.argmax(spectrum)])


def centroid_hz(x: np.ndarray, rate: int) -> float:
    power = np.abs(np.fft.rfft(x)) ** 2
    return float(np.sum(np.fft.rfftfreq(len(x), 1 / rate) * power) / np.sum(power))


def band_profile_db(x: np.ndarray, rate: int) -> np.ndarray:
    """Share of power in 24 log-spaced bands from 50 Hz to 8 kHz, in dB."""
    power = np.abs(np.fft.rfft(x)) ** 2
    f = np.fft.rfftfreq(len(x), 1 / rate)
    edges = np.geomspace(50, 8000, 25)
    bands = np.array(
        [power[(f >= lo) & (f < hi)].sum() for lo, hi in zip(edges[:-1], edges[1:], strict=True)]
    )
    return 10 * np.log10(bands / bands.sum() + 1e-12)


def active_rms_db(x: np.ndarray, rate: int) -> float:
    frame = rate // 50
    m = len(x) // frame
    power = np.mean(np.asarray(x[: m * frame], dtype=np.float64).reshape(m, frame) ** 2, axis=1)
    return float(10 * np.log10(np.mean(power[power >= power.max() * 1e-3])))


# ---------------------------------------------------------------------------------------
# Temporal-three alarm (checks.md section 10: ISO 8201 via the Ontario Building Code note
# A-3.2.4.18.(2): 0.5 s on, 0.5 s off, third off phase 1.5 s, each phase +/-10 %)


def test_t3_pulses_start_at_0_1_2_then_4_5_6_seconds() -> None:
    onsets, offsets = pulse_edges(sounds.smoke_alarm_t3(RATE, 10.0, rng()), RATE)
    np.testing.assert_allclose(onsets, [0, 1, 2, 4, 5, 6, 8, 9], atol=0.05)
    np.testing.assert_allclose(offsets - onsets, 0.5, atol=0.05)  # on phases 0.5 +/- 0.05 s
    gaps = onsets[1:] - offsets[:-1]
    np.testing.assert_allclose(gaps, [0.5, 0.5, 1.5, 0.5, 0.5, 1.5, 0.5], atol=0.05)
    assert np.all(np.abs(gaps[[2, 5]] - 1.5) <= 0.15)  # long off phase 1.5 +/- 0.15 s


def test_t3_cycle_is_4_seconds_not_4_5() -> None:
    # The common misreading (three times 0.5 on / 0.5 off, then 1.5 s off) gives a 4.5 s cycle.
    onsets, _ = pulse_edges(sounds.smoke_alarm_t3(RATE, 12.0, rng()), RATE)
    np.testing.assert_allclose(onsets[3::3] - onsets[:-3:3], 4.0, atol=0.05)


def test_t3_tone_is_near_3_khz() -> None:
    # Residential smoke alarms sound near 3 kHz (common practice).
    f = dominant_hz(sounds.smoke_alarm_t3(RATE, 10.0, rng()), RATE)
    assert 2700 <= f <= 3300


def test_t3_pattern_survives_the_clip_at_its_offset() -> None:
    clip, offset = sounds.make_clip("smoke_alarm_t3", rng=rng(3), event_at_s=2.0)
    assert offset == 2.0
    samples, rate = decode_mono(clip)
    onsets, _ = pulse_edges(samples, rate)
    np.testing.assert_allclose(onsets, [2, 3, 4, 6, 7, 8], atol=0.05)


# ---------------------------------------------------------------------------------------
# Cry and others


def test_cry_fundamental_is_between_350_and_550_hz() -> None:
    x = sounds.baby_cry(RATE, 10.0, rng()).astype(np.float64)
    frame = int(0.04 * RATE)
    frames = x[: len(x) // frame * frame].reshape(-1, frame)
    energy = np.mean(frames**2, axis=1)
    voiced = frames[energy > 0.1 * energy.max()]
    assert len(voiced) > 100  # most of the 10 s is crying
    lo, hi = RATE // 800, RATE // 200  # search 200-800 Hz, wider than the range asserted
    f0 = []
    for row in voiced:
        row = row - row.mean()
        ac = np.fft.irfft(np.abs(np.fft.rfft(row, 2 * frame)) ** 2)[:frame]
        f0.append(RATE / (lo + np.argmax(ac[lo : hi + 1])))
    assert np.all((np.array(f0) >= 350) & (np.array(f0) <= 560))  # one lag step of slack at the top
    assert 380 <= np.median(f0) <= 520


def test_cry_comes_in_bursts_of_about_a_second() -> None:
    onsets, offsets = pulse_edges(sounds.baby_cry(RATE, 10.0, rng()), RATE)
    lengths = offsets - onsets
    assert 5 <= len(onsets) <= 10
    assert np.all((lengths > 0.6) & (lengths < 1.4))


def test_spectral_centroids_order_glass_above_cry_above_traffic() -> None:
    glass, cry, road = (
        centroid_hz(sounds.SOUNDS[k](RATE, 10.0, rng()), RATE) for k in ("glass_break", "baby_cry", "traffic")
    )
    assert glass > 3000
    assert glass > cry > road
    assert road < 800


def test_each_kind_is_recognised_by_its_spectrum_across_seeds() -> None:
    kinds = list(sounds.SOUNDS)
    a = {k: band_profile_db(sounds.SOUNDS[k](RATE, 10.0, rng(1)), RATE) for k in kinds}
    b = {k: band_profile_db(sounds.SOUNDS[k](RATE, 10.0, rng(2)), RATE) for k in kinds}
    for k in kinds:
        distance = {j: float(np.mean(np.abs(a[k] - b[j]))) for j in kinds}
        nearest_other = min(d for j, d in distance.items() if j != k)
        assert distance[k] * 2 < nearest_other, (k, distance)


def test_room_tone_is_quiet() -> None:
    x = sounds.room_tone(RATE, 10.0, rng()).astype(np.float64)
    assert 20 * np.log10(np.sqrt(np.mean(x**2))) == pytest.approx(-55.0, abs=0.1)


@pytest.mark.parametrize("kind", sorted(sounds.SOUNDS))
@pytest.mark.parametrize("rate", [8000, 48000])
def test_every_kind_works_at_other_rates(kind: str, rate: int) -> None:
    x = sounds.SOUNDS[kind](rate, 2.0, rng())
    assert x.dtype == np.float32
    assert x.shape == (2 * rate,)
    assert np.all(np.isfinite(x))
    assert 0 < np.max(np.abs(x)) <= 1.0


def test_zero_length_gives_an_empty_array() -> None:
    for kind, fn in sounds.SOUNDS.items():
        assert fn(RATE, 0.0, rng()).shape == (0,), kind


# ---------------------------------------------------------------------------------------
# Mixing and clips


def test_mix_puts_the_event_snr_db_above_the_room_tone() -> None:
    event = sounds.smoke_alarm_t3(RATE, 10.0, rng())
    mixed = sounds.mix(event, RATE, rng(8), snr_db=30.0, room_level_dbfs=-50.0).astype(np.float64)
    room = sounds.room_tone(RATE, 10.0, rng(8)).astype(np.float64) * 10 ** (5 / 20)  # same draw
    assert 20 * np.log10(np.sqrt(np.mean(room**2))) == pytest.approx(-50.0, abs=0.1)
    assert active_rms_db(mixed - room, RATE) == pytest.approx(-20.0, abs=0.2)


def test_mix_turns_down_instead_of_clipping() -> None:
    mixed = sounds.mix(sounds.door_slam(RATE, 2.0, rng()), RATE, rng(), snr_db=80.0)
    assert float(np.max(np.abs(mixed))) == pytest.approx(0.98, abs=1e-3)


@pytest.mark.parametrize("kind", sorted(sounds.SOUNDS))
def test_make_clip_passes_probe_as_a_10_s_16_khz_mono_wav(kind: str) -> None:
    clip, offset = sounds.make_clip(kind, rng=rng(5))
    info = probe(clip)
    assert (info.format, info.subtype, info.sample_rate_hz, info.channels) == ("WAV", "PCM_16", 16000, 1)
    assert info.frames == 160000
    assert info.duration_s == 10.0
    assert info.clipped_fraction == 0.0
    assert info.rms_dbfs > -56.0
    if kind in sounds.CONTINUOUS_KINDS:
        assert offset == 0.0
    else:
        assert 0.5 <= offset <= 10.0 / 3


def test_make_clip_is_quiet_before_the_event() -> None:
    clip, offset = sounds.make_clip("glass_break", rng=rng(2), event_at_s=4.0)
    samples, rate = decode_mono(clip)
    before = samples[: int(3.9 * rate)].astype(np.float64)
    after = samples[int(4.0 * rate) : int(4.5 * rate)].astype(np.float64)
    assert 20 * np.log10(np.sqrt(np.mean(before**2))) == pytest.approx(-55.0, abs=1.0)
    assert 20 * np.log10(np.sqrt(np.mean(after**2)) / np.sqrt(np.mean(before**2))) > 20.0


def test_make_clip_rounds_the_offset_to_a_sample() -> None:
    _, offset = sounds.make_clip("dog_bark", rng=rng(), event_at_s=1.23456789)
    assert offset * RATE == round(offset * RATE)
    assert offset == pytest.approx(1.23456789, abs=0.5 / RATE)


def test_make_clip_other_rate_and_length() -> None:
    clip, _ = sounds.make_clip("baby_cry", rate_hz=8000, duration_s=3.0, rng=rng())
    info = probe(clip)
    assert (info.sample_rate_hz, info.frames) == (8000, 24000)


def test_make_clip_refuses_unknown_kind() -> None:
    with pytest.raises(KeyError):
        sounds.make_clip("thunder", rng=rng())


def test_to_wav_bytes_writes_the_canonical_header_and_clips() -> None:
    data = sounds.to_wav_bytes(np.array([0.0, 0.5, 2.0, -3.0], dtype=np.float32), RATE)
    # checks.md section 11: 44-byte header, data size = frames * block align.
    assert len(data) == 44 + 8
    assert struct.unpack_from("<4sI4s4sIHHIIHH4sI", data, 0) == (
        b"RIFF",
        44,
        b"WAVE",
        b"fmt ",
        16,
        1,
        1,
        RATE,
        2 * RATE,
        2,
        16,
        b"data",
        8,
    )
    assert struct.unpack_from("<4h", data, 44) == (0, 16384, 32767, -32768)


def test_to_wav_bytes_float_subtype() -> None:
    data = sounds.to_wav_bytes(sounds.piano(RATE, 1.0, rng()), RATE, subtype="FLOAT")
    assert probe(data).subtype == "FLOAT"


# ---------------------------------------------------------------------------------------
# Determinism


@pytest.mark.parametrize("kind", sorted(sounds.SOUNDS))
def test_same_seed_same_sound_other_seed_other_sound(kind: str) -> None:
    fn = sounds.SOUNDS[kind]
    first, again, other = fn(RATE, 3.0, rng(11)), fn(RATE, 3.0, rng(11)), fn(RATE, 3.0, rng(12))
    np.testing.assert_array_equal(first, again)
    assert not np.array_equal(first, other)


def test_make_clip_is_deterministic() -> None:
    assert sounds.make_clip("tv_babble", rng=rng(4)) == sounds.make_clip("tv_babble", rng=rng(4))
    assert sounds.make_clip("tv_babble", rng=rng(4)) != sounds.make_clip("tv_babble", rng=rng(5))
