"""Clip probing: accepted formats from outside tools, rejections, and malformed RIFF/WAVE built by hand.

The WAV layout used for the hand-built files is the RIFF/WAVE format of the Microsoft/IBM
"Multimedia Programming Interface and Data Specifications 1.0" (1991), as summarised in
reference/checks.md section 11; FLAC as in the Xiph.Org specification (RFC 9639).
"""

from __future__ import annotations

import io
import math
import os
import shutil
import struct
import subprocess
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from server.devices.audio import LEVEL_FLOOR_DBFS, ClipInfo, decode_mono, probe
from server.errors import AppError, UnreadableAudio, UnsupportedAudio, UnsupportedChannels

RATE = 16000
HALF_SCALE_PEAK_DBFS = 20 * math.log10(0.5)  # -6.02 dBFS
HALF_SCALE_SINE_RMS_DBFS = 20 * math.log10(0.5 / math.sqrt(2))  # -9.03 dBFS (sine RMS = peak / sqrt 2)


# ---------------------------------------------------------------------------------------
# Helpers


@pytest.fixture(scope="module")
def sox() -> str:
    path = shutil.which("sox")
    if path is None:
        if os.environ.get("CI") == "true":
            pytest.fail("sox is not installed: the outside-tool format checks must run in CI")
        pytest.skip("sox is not installed; outside-tool format checks skipped")
    return path


def sox_write(
    sox: str, out: Path, *fmt: str, rate: int = RATE, channels: int = 1, seconds: float = 1.0
) -> bytes:
    """A 1 kHz half-scale sine written by SoX (no dither, so the levels are exact)."""
    subprocess.run(
        [
            sox,
            "-D",
            "-n",
            "-r",
            str(rate),
            "-c",
            str(channels),
            *fmt,
            str(out),
            "synth",
            str(seconds),
            "sine",
            "1000",
            "vol",
            "0.5",
        ],
        check=True,
        capture_output=True,
        timeout=30,
    )
    return out.read_bytes()


def sine(
    seconds: float = 1.0, rate: int = RATE, amplitude: float = 0.5, freq: float = 1000.0, channels: int = 1
) -> np.ndarray:
    x = amplitude * np.sin(2 * np.pi * freq * np.arange(int(round(seconds * rate))) / rate)
    return np.repeat(x[:, None], channels, axis=1) if channels > 1 else x


def sf_bytes(samples: np.ndarray, rate: int = RATE, *, fmt: str = "WAV", subtype: str = "PCM_16") -> bytes:
    buf = io.BytesIO()
    sf.write(buf, samples, rate, format=fmt, subtype=subtype)
    return buf.getvalue()


def chunk(chunk_id: bytes, payload: bytes, *, pad: bool = True, size: int | None = None) -> bytes:
    """One RIFF chunk: id, little-endian size, payload, and a pad byte when the size is odd."""
    declared = len(payload) if size is None else size
    return chunk_id + struct.pack("<I", declared) + payload + (b"\0" if pad and len(payload) % 2 else b"")


def fmt_payload(
    *,
    tag: int = 1,
    channels: int = 1,
    rate: int = RATE,
    bits: int = 16,
    block_align: int | None = None,
    byte_rate: int | None = None,
) -> bytes:
    align = channels * bits // 8 if block_align is None else block_align
    return struct.pack(
        "<HHIIHH", tag, channels, rate, rate * align if byte_rate is None else byte_rate, align, bits
    )


def pcm16(seconds: float = 1.0) -> bytes:
    return np.round(sine(seconds) * 32767).astype("<i2").tobytes()


def riff(*chunks: bytes, size: int | None = None) -> bytes:
    body = b"WAVE" + b"".join(chunks)
    return b"RIFF" + struct.pack("<I", len(body) if size is None else size) + body


def assert_rejected(data: bytes, cls: type[AppError], code: str, **limits: float) -> AppError:
    with pytest.raises(AppError) as caught:
        probe(data, **limits)
    assert type(caught.value) is cls, f"{type(caught.value).__name__}: {caught.value.message}"
    assert caught.value.code == code
    assert caught.value.status == 422
    assert caught.value.message.endswith(".")
    return caught.value


def assert_half_scale_sine(info: ClipInfo, *, frames: int = RATE, rate: int = RATE) -> None:
    assert info.channels == 1
    assert info.sample_rate_hz == rate
    assert info.frames == frames
    assert info.duration_s == pytest.approx(frames / rate)
    assert info.peak_dbfs == pytest.approx(HALF_SCALE_PEAK_DBFS, abs=0.05)
    assert info.rms_dbfs == pytest.approx(HALF_SCALE_SINE_RMS_DBFS, abs=0.05)
    assert info.clipped_fraction == 0.0


# ---------------------------------------------------------------------------------------
# The canonical header (checks.md section 11)


def test_canonical_pcm16_header_from_soundfile_matches_the_specification() -> None:
    data = sf_bytes(sine(0.5))
    # checks.md section 11: 0.5 s, 16 kHz, mono, 16-bit -> 16044 bytes, RIFF size 16036, data 16000.
    assert len(data) == 16044
    assert data[0:4] == b"RIFF"
    assert struct.unpack_from("<I", data, 4)[0] == 16036
    assert data[8:12] == b"WAVE"
    assert data[12:16] == b"fmt "
    assert struct.unpack_from("<IHHIIHH", data, 16) == (16, 1, 1, 16000, 32000, 2, 16)
    assert data[36:40] == b"data"
    assert struct.unpack_from("<I", data, 40)[0] == 16000
    info = probe(data)
    assert (info.format, info.subtype, info.frames, info.duration_s) == ("WAV", "PCM_16", 8000, 0.5)


def test_hand_built_canonical_file_is_byte_identical_to_soundfile() -> None:
    built = riff(chunk(b"fmt ", fmt_payload()), chunk(b"data", pcm16(0.5)))
    written = sf_bytes(np.round(sine(0.5) * 32767) / 32768)
    assert built == written
    assert_half_scale_sine(probe(built), frames=8000)


# ---------------------------------------------------------------------------------------
# Accepted formats, written by SoX


def test_sox_pcm16_wav_is_accepted(sox: str, tmp_path: Path) -> None:
    data = sox_write(sox, tmp_path / "a.wav", "-b", "16", "-e", "signed-integer")
    assert struct.unpack_from("<H", data, 20)[0] == 1  # plain PCM header
    info = probe(data)
    assert (info.format, info.subtype) == ("WAV", "PCM_16")
    assert_half_scale_sine(info)


def test_sox_pcm24_wav_uses_extensible_header_and_is_accepted(sox: str, tmp_path: Path) -> None:
    data = sox_write(sox, tmp_path / "a.wav", "-b", "24", "-e", "signed-integer")
    # checks.md section 11: SoX writes 24-bit as WAVE_FORMAT_EXTENSIBLE, fmt size 40, samples at 80.
    assert struct.unpack_from("<IH", data, 16) == (40, 0xFFFE)
    assert data[72:76] == b"data"
    info = probe(data)
    assert (info.format, info.subtype) == ("WAV", "PCM_24")
    assert_half_scale_sine(info)


def test_sox_float32_wav_is_accepted(sox: str, tmp_path: Path) -> None:
    data = sox_write(sox, tmp_path / "a.wav", "-b", "32", "-e", "floating-point")
    assert struct.unpack_from("<H", data, 20)[0] == 3  # IEEE float
    info = probe(data)
    assert (info.format, info.subtype) == ("WAV", "FLOAT")
    assert_half_scale_sine(info)


@pytest.mark.parametrize("bits", [16, 24])
def test_sox_flac_is_accepted(sox: str, tmp_path: Path, bits: int) -> None:
    data = sox_write(sox, tmp_path / "a.flac", "-b", str(bits))
    assert data[:4] == b"fLaC"
    info = probe(data)
    assert (info.format, info.subtype) == ("FLAC", f"PCM_{bits}")
    assert_half_scale_sine(info)


def test_sox_pcm24_with_odd_data_size_and_pad_byte_is_accepted(sox: str, tmp_path: Path) -> None:
    frames = 8001  # 3 * 8001 bytes of samples: odd, so a pad byte follows the data chunk
    data = sox_write(sox, tmp_path / "a.wav", "-b", "24", "-e", "signed-integer", seconds=frames / RATE)
    assert struct.unpack_from("<I", data, 76)[0] == 3 * frames
    assert len(data) == 80 + 3 * frames + 1
    assert probe(data).frames == frames


# ---------------------------------------------------------------------------------------
# Accepted formats, written by soundfile (libsndfile)


@pytest.mark.parametrize(
    ("fmt", "subtype", "tag"),
    [
        ("WAV", "PCM_16", 1),
        ("WAV", "PCM_24", 1),
        ("WAV", "FLOAT", 3),
        ("WAVEX", "PCM_16", 0xFFFE),
        ("WAVEX", "PCM_24", 0xFFFE),
        ("WAVEX", "FLOAT", 0xFFFE),
    ],
)
def test_soundfile_wav_variants_are_accepted(fmt: str, subtype: str, tag: int) -> None:
    data = sf_bytes(sine(), fmt=fmt, subtype=subtype)
    assert struct.unpack_from("<H", data, 20)[0] == tag
    info = probe(data)
    assert (info.format, info.subtype) == ("WAV", subtype)
    assert_half_scale_sine(info)


@pytest.mark.parametrize("subtype", ["PCM_16", "PCM_24"])
def test_soundfile_flac_is_accepted(subtype: str) -> None:
    info = probe(sf_bytes(sine(), fmt="FLAC", subtype=subtype))
    assert (info.format, info.subtype) == ("FLAC", subtype)
    assert_half_scale_sine(info)


def test_file_name_is_ignored_and_paths_are_read(tmp_path: Path) -> None:
    flac_named_wav = tmp_path / "clip.wav"
    flac_named_wav.write_bytes(sf_bytes(sine(), fmt="FLAC"))
    wav_named_mp3 = tmp_path / "clip.mp3"
    wav_named_mp3.write_bytes(sf_bytes(sine()))
    assert probe(flac_named_wav).format == "FLAC"
    assert probe(str(wav_named_mp3)).format == "WAV"


@pytest.mark.parametrize(("rate", "seconds"), [(8000, 1.0), (48000, 1.0), (RATE, 0.5), (RATE, 60.0)])
def test_limits_are_inclusive(rate: int, seconds: float) -> None:
    info = probe(sf_bytes(sine(seconds, rate), rate))
    assert info.sample_rate_hz == rate
    assert info.duration_s == seconds


# ---------------------------------------------------------------------------------------
# Levels


def test_full_scale_square_reads_0_dbfs_rms_and_is_all_clipped() -> None:
    square = np.where(np.arange(RATE) % 16 < 8, 1.0, -1.0)
    info = probe(sf_bytes(square))
    assert info.peak_dbfs == pytest.approx(0.0, abs=0.001)
    assert info.rms_dbfs == pytest.approx(0.0, abs=0.001)
    assert info.clipped_fraction == 1.0


def test_full_scale_sine_reads_minus_3_01_dbfs_rms() -> None:
    info = probe(sf_bytes(sine(amplitude=1.0, freq=997.0), subtype="PCM_24"))
    assert info.rms_dbfs == pytest.approx(-3.0103, abs=0.01)  # 20 log10(1/sqrt 2)
    assert info.peak_dbfs == pytest.approx(0.0, abs=0.01)


def test_clipped_fraction_of_an_overdriven_sine() -> None:
    # A sine at twice full scale, clipped: |2 sin| >= 1 for a third of the cycle each half,
    # so 2/3 of the samples sit at full scale.
    overdriven = np.clip(sine(amplitude=2.0, freq=997.0), -1.0, 1.0)
    info = probe(sf_bytes(overdriven))
    assert info.clipped_fraction == pytest.approx(2 / 3, abs=0.01)


def test_digital_silence_reads_the_floor() -> None:
    info = probe(sf_bytes(np.zeros(RATE)))
    assert info.peak_dbfs == LEVEL_FLOOR_DBFS == -120.0
    assert info.rms_dbfs == LEVEL_FLOOR_DBFS
    assert info.clipped_fraction == 0.0


def test_decode_mono_returns_float32_samples_and_rate() -> None:
    x = sine(0.25)  # shorter than probe's minimum: decode_mono applies no limits
    samples, rate = decode_mono(sf_bytes(x))
    assert rate == RATE
    assert samples.dtype == np.float32
    assert samples.shape == (4000,)
    assert np.max(np.abs(samples - x)) <= 1 / 32768


def test_decode_mono_clips_float_beyond_full_scale() -> None:
    samples, _ = decode_mono(sf_bytes(sine(amplitude=1.5), subtype="FLOAT"))
    assert float(samples.max()) == 1.0
    assert float(samples.min()) == -1.0


def test_decode_mono_refuses_stereo() -> None:
    with pytest.raises(UnsupportedChannels):
        decode_mono(sf_bytes(sine(channels=2)))


# ---------------------------------------------------------------------------------------
# Unsupported: recognisable audio we do not accept


@pytest.mark.parametrize(
    ("name", "fmt"),
    [
        ("u8.wav", ["-b", "8", "-e", "unsigned-integer"]),
        ("mulaw.wav", ["-e", "mu-law"]),
        ("alaw.wav", ["-e", "a-law"]),
        ("ima.wav", ["-e", "ima-adpcm"]),
        ("ms.wav", ["-e", "ms-adpcm"]),
        ("gsm.wav", ["-e", "gsm-full-rate"]),
        ("s32.wav", ["-b", "32", "-e", "signed-integer"]),
        ("f64.wav", ["-b", "64", "-e", "floating-point"]),
        ("a.aiff", ["-b", "16"]),
        ("a.au", ["-b", "16"]),
        ("a.ogg", []),
        ("a.w64", ["-b", "16"]),
    ],
)
def test_sox_formats_we_do_not_accept_are_unsupported(
    sox: str, tmp_path: Path, name: str, fmt: list[str]
) -> None:
    data = sox_write(sox, tmp_path / name, *fmt)
    assert_rejected(data, UnsupportedAudio, "unsupported_audio")


@pytest.mark.parametrize(
    ("fmt", "subtype"),
    [
        ("WAV", "PCM_U8"),
        ("WAV", "PCM_32"),
        ("WAV", "DOUBLE"),
        ("WAV", "ULAW"),
        ("WAV", "ALAW"),
        ("WAV", "IMA_ADPCM"),
        ("WAV", "MS_ADPCM"),
        ("WAV", "G721_32"),
        ("WAVEX", "PCM_32"),
        ("WAVEX", "ULAW"),
        ("FLAC", "PCM_S8"),
        ("AIFF", "PCM_16"),
        ("AU", "PCM_16"),
        ("W64", "PCM_16"),
        ("RF64", "PCM_16"),
        ("CAF", "PCM_16"),
        ("OGG", "VORBIS"),
        ("MP3", "MPEG_LAYER_III"),
        ("NIST", "PCM_16"),
        ("VOC", "PCM_16"),
    ],
)
def test_soundfile_formats_we_do_not_accept_are_unsupported(fmt: str, subtype: str) -> None:
    data = sf_bytes(sine(), fmt=fmt, subtype=subtype)
    assert_rejected(data, UnsupportedAudio, "unsupported_audio")


def test_opus_is_unsupported() -> None:
    data = sf_bytes(sine(rate=48000), 48000, fmt="OGG", subtype="OPUS")
    assert_rejected(data, UnsupportedAudio, "unsupported_audio")


def test_stereo_from_sox_is_unsupported_channels(sox: str, tmp_path: Path) -> None:
    data = sox_write(sox, tmp_path / "st.wav", "-b", "16", channels=2)
    err = assert_rejected(data, UnsupportedChannels, "unsupported_channels")
    assert "2 channels" in err.message


@pytest.mark.parametrize(("fmt", "subtype"), [("WAV", "PCM_16"), ("WAVEX", "PCM_24"), ("FLAC", "PCM_16")])
def test_stereo_from_soundfile_is_unsupported_channels(fmt: str, subtype: str) -> None:
    assert_rejected(
        sf_bytes(sine(channels=2), fmt=fmt, subtype=subtype), UnsupportedChannels, "unsupported_channels"
    )


@pytest.mark.parametrize("rate", [64000, 4000])
def test_sample_rate_outside_limits_is_unsupported(sox: str, tmp_path: Path, rate: int) -> None:
    data = sox_write(sox, tmp_path / "r.wav", "-b", "16", rate=rate)
    err = assert_rejected(data, UnsupportedAudio, "unsupported_audio")
    assert str(rate) in err.message
    assert ("maximum of 48000 Hz" if rate > 48000 else "minimum of 8000 Hz") in err.message


def test_rate_limits_come_from_the_arguments() -> None:
    data = sf_bytes(sine(rate=22050), 22050)
    assert probe(data).sample_rate_hz == 22050
    err = assert_rejected(data, UnsupportedAudio, "unsupported_audio", max_rate_hz=16000)
    assert "22050" in err.message and "16000" in err.message


@pytest.mark.parametrize(("seconds", "limit"), [(0.2, "minimum of 0.5 s"), (70.0, "maximum of 60 s")])
def test_duration_outside_limits_is_unsupported(seconds: float, limit: str) -> None:
    err = assert_rejected(sf_bytes(sine(seconds)), UnsupportedAudio, "unsupported_audio")
    assert f"{seconds:.3f} s" in err.message
    assert limit in err.message


def test_long_flac_is_unsupported_without_decoding_it_all() -> None:
    err = assert_rejected(sf_bytes(sine(70.0), fmt="FLAC"), UnsupportedAudio, "unsupported_audio")
    assert "more than 60 s" in err.message


def test_flac_of_unknown_length_is_unreadable() -> None:
    # Total samples 0 and no MD5, as a streaming encoder leaves STREAMINFO (our rule: refused).
    data = bytearray(sf_bytes(sine(), fmt="FLAC"))
    packed = int.from_bytes(data[18:26], "big")
    data[18:26] = (packed & ~((1 << 36) - 1)).to_bytes(8, "big")
    data[26:42] = bytes(16)
    err = assert_rejected(bytes(data), UnreadableAudio, "unreadable_audio")
    assert "unknown" in err.message


def test_encoding_is_judged_before_channels() -> None:
    # An 8-bit stereo WAV: the encoding is the first thing the integrator must change.
    assert_rejected(sf_bytes(sine(channels=2), subtype="PCM_U8"), UnsupportedAudio, "unsupported_audio")


# ---------------------------------------------------------------------------------------
# Malformed RIFF/WAVE, built byte by byte


FMT = chunk(b"fmt ", fmt_payload())


def test_truncated_data_is_unreadable() -> None:
    whole = riff(FMT, chunk(b"data", pcm16()))
    err = assert_rejected(whole[:-1000], UnreadableAudio, "unreadable_audio")
    assert "truncated" in err.message


def test_truncated_data_with_riff_size_patched_is_unreadable() -> None:
    # The RIFF size matches the cut file, but the data chunk still declares the full length.
    cut = riff(FMT, chunk(b"data", pcm16()))[:-1000]
    patched = cut[:4] + struct.pack("<I", len(cut) - 8) + cut[8:]
    err = assert_rejected(patched, UnreadableAudio, "unreadable_audio")
    assert "'data'" in err.message and "32000" in err.message


def test_riff_size_larger_than_file_is_unreadable() -> None:
    assert_rejected(
        riff(FMT, chunk(b"data", pcm16()), size=36 + 32000 + 500), UnreadableAudio, "unreadable_audio"
    )


def test_riff_size_smaller_than_file_with_trailing_bytes_is_unreadable() -> None:
    # Our choice (module docstring): bytes past the RIFF chunk are refused, not ignored.
    data = riff(FMT, chunk(b"data", pcm16())) + b"trailing junk!"
    err = assert_rejected(data, UnreadableAudio, "unreadable_audio")
    assert "14 bytes after" in err.message


def test_data_size_larger_than_present_is_unreadable() -> None:
    lying = chunk(b"data", pcm16(), size=64000)
    assert_rejected(riff(FMT, lying), UnreadableAudio, "unreadable_audio")


def test_streaming_placeholder_data_size_is_unreadable() -> None:
    lying = chunk(b"data", pcm16(), size=0xFFFFFFFF)
    assert_rejected(riff(FMT, lying, size=0xFFFFFFFF), UnreadableAudio, "unreadable_audio")


def test_data_size_smaller_than_payload_is_unreadable() -> None:
    # The stray samples after the declared data are read as a chunk header of garbage.
    lying = chunk(b"data", pcm16(), size=16000)
    assert_rejected(riff(FMT, lying), UnreadableAudio, "unreadable_audio")


def test_missing_fmt_chunk_is_unreadable() -> None:
    err = assert_rejected(riff(chunk(b"data", pcm16())), UnreadableAudio, "unreadable_audio")
    assert "'fmt '" in err.message


def test_missing_data_chunk_is_unreadable() -> None:
    assert_rejected(
        riff(FMT, chunk(b"LIST", b"INFOISFT\x04\x00\x00\x00test")), UnreadableAudio, "unreadable_audio"
    )


def test_fmt_after_data_is_unreadable() -> None:
    # The specification requires the format chunk before the data chunk.
    err = assert_rejected(riff(chunk(b"data", pcm16()), FMT), UnreadableAudio, "unreadable_audio")
    assert "after" in err.message


def test_duplicate_data_chunk_is_unreadable() -> None:
    assert_rejected(
        riff(FMT, chunk(b"data", pcm16()), chunk(b"data", pcm16())), UnreadableAudio, "unreadable_audio"
    )


def test_odd_sized_list_chunk_with_pad_byte_is_accepted() -> None:
    info_list = b"INFOISFT" + struct.pack("<I", 5) + b"trial"  # 17 bytes: odd
    listed = chunk(b"LIST", info_list)
    assert len(listed) == 8 + 17 + 1
    for data in (
        riff(FMT, listed, chunk(b"data", pcm16())),
        riff(listed, FMT, chunk(b"data", pcm16())),
        riff(FMT, chunk(b"data", pcm16()), listed),
    ):
        assert_half_scale_sine(probe(data))


def test_odd_sized_chunk_without_its_pad_byte_is_unreadable() -> None:
    listed = chunk(b"LIST", b"INFOISFT" + struct.pack("<I", 5) + b"trial", pad=False)
    assert_rejected(riff(FMT, listed, chunk(b"data", pcm16())), UnreadableAudio, "unreadable_audio")


def test_missing_pad_byte_at_the_very_end_is_tolerated() -> None:
    samples24 = (
        np.round(sine(8001 / RATE) * 8388607).astype("<i4").view(np.uint8).reshape(-1, 4)[:, :3].tobytes()
    )
    data = riff(chunk(b"fmt ", fmt_payload(bits=24)), chunk(b"data", samples24, pad=False))
    assert probe(data).frames == 8001


def test_extra_fact_and_peak_chunks_are_skipped() -> None:
    fact = chunk(b"fact", struct.pack("<I", RATE))
    peak = chunk(b"PEAK", struct.pack("<IIfI", 1, 0, 0.5, 4))
    data = riff(
        chunk(b"fmt ", fmt_payload(tag=3, bits=32)),
        fact,
        peak,
        chunk(b"data", sine().astype("<f4").tobytes()),
    )
    info = probe(data)
    assert info.subtype == "FLOAT"
    assert_half_scale_sine(info)


@pytest.mark.parametrize(
    "fields", [{"block_align": 4}, {"byte_rate": 16000}, {"block_align": 1, "byte_rate": 16000}]
)
def test_fmt_fields_inconsistent_with_channels_and_bits_are_unreadable(fields: dict[str, int]) -> None:
    data = riff(chunk(b"fmt ", fmt_payload(**fields)), chunk(b"data", pcm16()))
    assert_rejected(data, UnreadableAudio, "unreadable_audio")


def test_data_size_not_whole_frames_is_unreadable() -> None:
    data = riff(FMT, chunk(b"data", pcm16() + b"\x01"))  # 32001 bytes of 2-byte frames
    err = assert_rejected(data, UnreadableAudio, "unreadable_audio")
    assert "32001" in err.message


def test_short_fmt_chunk_is_unreadable() -> None:
    assert_rejected(
        riff(chunk(b"fmt ", fmt_payload()[:14]), chunk(b"data", pcm16())), UnreadableAudio, "unreadable_audio"
    )


def test_zero_channels_is_unreadable() -> None:
    data = riff(chunk(b"fmt ", fmt_payload(channels=0, block_align=2)), chunk(b"data", pcm16()))
    assert_rejected(data, UnreadableAudio, "unreadable_audio")


def test_extensible_header_too_short_is_unreadable() -> None:
    data = riff(chunk(b"fmt ", fmt_payload(tag=0xFFFE)), chunk(b"data", pcm16()))
    assert_rejected(data, UnreadableAudio, "unreadable_audio")


def _extensible(sub_format: bytes, *, valid_bits: int = 16, bits: int = 16) -> bytes:
    ext = struct.pack("<HHI", 22, valid_bits, 4) + sub_format
    return chunk(b"fmt ", fmt_payload(tag=0xFFFE, bits=bits) + ext)


GUID_TAIL = bytes.fromhex("000000001000800000aa00389b71")


def test_extensible_pcm_built_by_hand_is_accepted() -> None:
    data = riff(_extensible(b"\x01\x00" + GUID_TAIL), chunk(b"data", pcm16()))
    assert_half_scale_sine(probe(data))


def test_extensible_with_unknown_sub_format_is_unsupported() -> None:
    data = riff(_extensible(bytes(range(16))), chunk(b"data", pcm16()))
    assert_rejected(data, UnsupportedAudio, "unsupported_audio")


def test_extensible_with_fewer_valid_bits_is_unsupported() -> None:
    data = riff(_extensible(b"\x01\x00" + GUID_TAIL, valid_bits=12), chunk(b"data", pcm16()))
    assert_rejected(data, UnsupportedAudio, "unsupported_audio")


def test_truncated_mulaw_is_unreadable_not_unsupported() -> None:
    # Structure is checked before encoding (module docstring).
    data = riff(chunk(b"fmt ", fmt_payload(tag=7, bits=8)), chunk(b"data", bytes(16000)))
    assert_rejected(data, UnsupportedAudio, "unsupported_audio")
    assert_rejected(data[:-100], UnreadableAudio, "unreadable_audio")


def test_riff_of_another_form_type_is_unreadable() -> None:
    data = b"RIFF" + struct.pack("<I", 12) + b"WEBPVP8 " + bytes(4)
    assert_rejected(data, UnreadableAudio, "unreadable_audio")


def test_header_only_file_is_unsupported_for_its_zero_length() -> None:
    err = assert_rejected(riff(FMT, chunk(b"data", b"")), UnsupportedAudio, "unsupported_audio")
    assert "0.000 s" in err.message


# ---------------------------------------------------------------------------------------
# Malformed FLAC


FLAC16 = sf_bytes(sine(), fmt="FLAC")


def test_truncated_flac_is_unreadable() -> None:
    assert_rejected(FLAC16[: len(FLAC16) // 2], UnreadableAudio, "unreadable_audio")


def test_flac_with_a_corrupted_frame_is_unreadable() -> None:
    damaged = bytearray(FLAC16)
    damaged[len(damaged) * 2 // 3] ^= 0xFF
    assert_rejected(bytes(damaged), UnreadableAudio, "unreadable_audio")


def test_flac_whose_streaminfo_lies_about_the_length_is_unreadable() -> None:
    # STREAMINFO starts at byte 8; bytes 10-17 of it pack rate, channels, bits and total samples.
    head = bytearray(FLAC16)
    packed = int.from_bytes(head[18:26], "big")
    assert packed & ((1 << 36) - 1) == RATE
    head[18:26] = (packed + 4000).to_bytes(8, "big")
    assert_rejected(bytes(head), UnreadableAudio, "unreadable_audio")


def test_flac_with_wrong_md5_is_unreadable(sox: str, tmp_path: Path) -> None:
    data = bytearray(sox_write(sox, tmp_path / "a.flac", "-b", "16"))
    assert any(data[26:42])  # SoX's encoder stores the MD5 of the audio
    data[26] ^= 0x01
    err = assert_rejected(bytes(data), UnreadableAudio, "unreadable_audio")
    assert "MD5" in err.message


def test_flac_without_streaminfo_first_is_unreadable() -> None:
    data = b"fLaC" + bytes([0x84, 0, 0, 4]) + b"\0\0\0\0" + FLAC16[4:]
    assert_rejected(data, UnreadableAudio, "unreadable_audio")


def test_flac_metadata_cut_short_is_unreadable() -> None:
    assert_rejected(FLAC16[:30], UnreadableAudio, "unreadable_audio")


# ---------------------------------------------------------------------------------------
# Not audio at all


def _png() -> bytes:
    from PIL import Image

    buf = io.BytesIO()
    Image.new("RGB", (32, 32), (40, 120, 200)).save(buf, "PNG")
    return buf.getvalue()


@pytest.mark.parametrize(
    "data",
    [
        b"",
        b"hello, this is a text file and not a recording\n" * 40,
        b'{"event_id": "e-1", "sound_class": "smoke_alarm", "score": 0.93}',
        bytes(16044),
        b"\xff" * 4096,
        np.random.default_rng(7).bytes(20000),
        b"RIFF",
        b"fLaC",
    ],
    ids=["empty", "text", "json", "zeros", "ones", "random", "riff-magic-only", "flac-magic-only"],
)
def test_non_audio_bytes_are_unreadable(data: bytes) -> None:
    assert_rejected(data, UnreadableAudio, "unreadable_audio")


def test_png_is_unreadable() -> None:
    err = assert_rejected(_png(), UnreadableAudio, "unreadable_audio")
    assert "not recognisable as audio" in err.message


def test_empty_clip_message_says_empty() -> None:
    err = assert_rejected(b"", UnreadableAudio, "unreadable_audio")
    assert "empty" in err.message
