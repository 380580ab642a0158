"""Probe alert clip bytes: decide whether a clip is accepted, and measure it.

Pure functions over bytes; no database, no settings (limits come in as arguments).

Accepted clips
    WAV (RIFF/WAVE) with integer PCM at 16 or 24 bits, or IEEE float at 32 bits, in the
    plain header (format tag 1 or 3) or WAVE_FORMAT_EXTENSIBLE (tag 0xFFFE with the PCM or
    IEEE-float sub-format GUID); FLAC at 16 or 24 bits. Mono only.

A clip is judged by its bytes, never by its file name. RIFF/WAVE is laid out as in the
Microsoft/IBM "Multimedia Programming Interface and Data Specifications 1.0" (1991); FLAC as
in the Xiph.Org format specification (RFC 9639). Both headers are parsed here before the whole
clip is decoded with libsndfile (through ``soundfile``), because libsndfile quietly reads a
truncated WAV as a shorter one.

Which error a rejected clip gets
    ``UnreadableAudio`` (unreadable_audio): the bytes are not recognisable as audio at all
        (empty, text, images, zeros: no known audio signature and libsndfile cannot open
        them), or they claim to be one of the accepted containers (start with ``RIFF....WAVE``
        or ``fLaC``) but are damaged: sizes that contradict the file, missing or misplaced
        chunks, inconsistent header fields, or audio that fails to decode completely.
    ``UnsupportedAudio`` (unsupported_audio): the bytes are recognisably audio and intact
        enough to say what they are, but not what we accept: another container (AIFF, AU,
        Ogg, MP3, W64, RF64, CAF, ...), another WAV encoding (8-bit PCM, mu-law, A-law,
        ADPCM, 32-bit integer, 64-bit float, ...), another FLAC depth, or a sample rate or
        duration outside the limits.
    ``UnsupportedChannels`` (unsupported_channels): an accepted encoding with more than one
        channel.

Checks run in this order, and the first failure is reported: container structure
(unreadable) -> encoding (unsupported) -> header field consistency (unreadable) -> channels
-> sample rate -> full decode (unreadable) -> duration on the decoded frames. So a truncated
mu-law WAV is unreadable, an intact one is unsupported.

Decisions about WAV structure
    - Bytes after the end of the RIFF chunk (RIFF size smaller than the file) are rejected as
      unreadable: a reader never sees them, and on a device they usually mean a framing bug
      (a reused buffer, two clips joined). One extra byte is allowed when the RIFF size is
      odd, since that is the RIFF chunk's own pad byte.
    - Every chunk is followed by a pad byte when its size is odd; a missing pad byte is
      tolerated only at the very end of the file.
    - ``fmt `` must come before ``data`` (the specification requires it), and each may occur
      only once. Other chunks (LIST, fact, PEAK, ...) may appear anywhere.

Levels
    ``peak_dbfs`` and ``rms_dbfs`` are relative to digital full scale (a full-scale square
    wave reads 0 dBFS RMS, a full-scale sine -3.01 dBFS RMS and 0 dBFS peak). Digital silence
    would give minus infinity; both are floored at ``LEVEL_FLOOR_DBFS`` (-120 dBFS) instead,
    below the noise floor of 16-bit audio (about -98 dBFS).
"""

from __future__ import annotations

import hashlib
import io
import math
import os
import struct
from dataclasses import dataclass

import numpy as np
import soundfile as sf

from server.errors import UnreadableAudio, UnsupportedAudio, UnsupportedChannels

LEVEL_FLOOR_DBFS = -120.0
# decode_mono's ceiling: it has no duration limit, but must not let a small FLAC expand unbounded.
DECODE_MONO_MAX_S = 600.0
_READ_BLOCK_FRAMES = 1 << 16

_WAVE_FORMAT_PCM = 0x0001
_WAVE_FORMAT_IEEE_FLOAT = 0x0003
_WAVE_FORMAT_EXTENSIBLE = 0xFFFE
# KSDATAFORMAT_SUBTYPE_* GUIDs end with this 14-byte tail; the first two bytes carry the format tag.
_GUID_TAIL = bytes.fromhex("000000001000800000aa00389b71")

# Names for common WAV format tags we refuse, so the message says what the device sent.
_WAV_TAG_NAMES = {
    0x0002: "Microsoft ADPCM",
    0x0006: "A-law",
    0x0007: "mu-law",
    0x0011: "IMA ADPCM",
    0x0031: "GSM 6.10",
    0x0040: "G.721 ADPCM",
    0x0050: "MPEG audio",
    0x0055: "MPEG layer III",
    0x0092: "Dolby AC-3",
    0x00FF: "AAC",
    0x1610: "AAC",
    0xF1AC: "FLAC-in-WAV",
}

# (offset, signature, container name) for audio containers we recognise but do not accept.
_OTHER_AUDIO_SIGNATURES: tuple[tuple[int, bytes, str], ...] = (
    (0, b"RIFX", "big-endian RIFF (RIFX)"),
    (0, b"RF64", "RF64"),
    (0, b"BW64", "BW64"),
    (0, b"riff\x2e\x91\xcf\x11", "Sony Wave64 (W64)"),
    (0, b"OggS", "Ogg"),
    (0, b"ID3", "MP3 (ID3 tag)"),
    (0, b".snd", "Sun/NeXT AU"),
    (0, b"caff", "Apple CAF"),
    (0, b"wvpk", "WavPack"),
    (0, b"MAC ", "Monkey's Audio"),
    (0, b"#!AMR", "AMR"),
    (0, b"NIST_1A", "NIST SPHERE"),
    (0, b"Creative Voice File", "Creative VOC"),
    (0, b"\x1a\x45\xdf\xa3", "Matroska/WebM"),
    (4, b"ftypM4A", "MPEG-4 audio"),
)


@dataclass(frozen=True)
class ClipInfo:
    """What a probed clip is. Levels in dBFS (full-scale sine RMS = -3.01), floored at -120."""

    format: str  # "WAV" or "FLAC"
    subtype: str  # "PCM_16", "PCM_24" or "FLOAT"
    sample_rate_hz: int
    channels: int
    frames: int
    duration_s: float
    peak_dbfs: float
    rms_dbfs: float
    clipped_fraction: float  # share of samples at or within one LSB of full scale


@dataclass(frozen=True)
class _Header:
    format: str
    subtype: str
    bits: int
    channels: int
    sample_rate_hz: int
    frames: int  # as the header declares them
    flac_md5: bytes | None = None


# ---------------------------------------------------------------------------------------
# Public interface


def probe(
    source: bytes | bytearray | memoryview | str | os.PathLike[str],
    *,
    min_rate_hz: int = 8000,
    max_rate_hz: int = 48000,
    min_duration_s: float = 0.5,
    max_duration_s: float = 60.0,
) -> ClipInfo:
    """Check a whole clip against the accepted formats and limits; return its ``ClipInfo``.

    Raises ``UnreadableAudio``, ``UnsupportedAudio`` or ``UnsupportedChannels`` (see the module
    docstring for which). Limits are inclusive. A path that cannot be read raises ``OSError``:
    that is the caller's problem, not the clip's.
    """
    data = _as_bytes(source)
    header = _parse_header(data)
    _check_mono(header)
    rate = header.sample_rate_hz
    if rate < min_rate_hz:
        raise UnsupportedAudio(f"The clip's sample rate is {rate} Hz, below the minimum of {min_rate_hz} Hz.")
    if rate > max_rate_hz:
        raise UnsupportedAudio(f"The clip's sample rate is {rate} Hz, above the maximum of {max_rate_hz} Hz.")
    samples, complete = _decode(data, header, max_frames=math.floor(max_duration_s * rate))
    frames = int(samples.shape[0])
    duration_s = frames / rate
    if not complete:
        if header.format == "WAV":  # the data chunk's size was checked against the file
            frames = header.frames or frames
            raise UnsupportedAudio(
                f"The clip lasts {frames / rate:.3f} s ({frames} frames at {rate} Hz), longer "
                f"than the maximum of {max_duration_s:g} s."
            )
        raise UnsupportedAudio(
            f"The clip lasts more than {max_duration_s:g} s (decoding stopped after {frames} "
            f"frames at {rate} Hz), longer than the maximum of {max_duration_s:g} s."
        )
    if duration_s < min_duration_s:
        raise UnsupportedAudio(
            f"The clip lasts {duration_s:.3f} s ({frames} frames at {rate} Hz), shorter than "
            f"the minimum of {min_duration_s:g} s."
        )
    if duration_s > max_duration_s:
        raise UnsupportedAudio(
            f"The clip lasts {duration_s:.3f} s ({frames} frames at {rate} Hz), longer than "
            f"the maximum of {max_duration_s:g} s."
        )
    peak_dbfs, rms_dbfs, clipped = _levels(samples[:, 0], header)
    return ClipInfo(
        format=header.format,
        subtype=header.subtype,
        sample_rate_hz=rate,
        channels=header.channels,
        frames=frames,
        duration_s=duration_s,
        peak_dbfs=peak_dbfs,
        rms_dbfs=rms_dbfs,
        clipped_fraction=clipped,
    )


def decode_mono(source: bytes | bytearray | memoryview | str | os.PathLike[str]) -> tuple[np.ndarray, int]:
    """Decode an accepted clip to float32 samples in [-1, 1] and its sample rate.

    Applies the same format checks as ``probe`` but no rate or duration limits (for clips
    already stored, e.g. to draw a spectrogram), apart from a ``DECODE_MONO_MAX_S`` ceiling.
    Float samples beyond full scale are clipped.
    """
    data = _as_bytes(source)
    header = _parse_header(data)
    _check_mono(header)
    rate = header.sample_rate_hz
    samples, complete = _decode(data, header, max_frames=math.floor(DECODE_MONO_MAX_S * rate))
    if not complete:
        raise UnsupportedAudio(
            f"The clip lasts more than {DECODE_MONO_MAX_S:g} s, longer than decoding allows."
        )
    samples = samples[:, 0]
    return np.clip(samples, -1.0, 1.0).astype(np.float32, copy=False), header.sample_rate_hz


# ---------------------------------------------------------------------------------------
# Sniffing


def _as_bytes(source: bytes | bytearray | memoryview | str | os.PathLike[str]) -> bytes:
    if isinstance(source, bytes):
        return source
    if isinstance(source, (bytearray, memoryview)):
        return bytes(source)
    with open(source, "rb") as fh:
        return fh.read()


def _parse_header(data: bytes) -> _Header:
    if not data:
        raise UnreadableAudio("The clip is empty (0 bytes); send a WAV or FLAC file.")
    if data[:4] == b"RIFF":
        if len(data) < 12:
            raise UnreadableAudio(f"The clip is {len(data)} bytes, too short for a RIFF header (12 bytes).")
        form = data[8:12]
        if form == b"WAVE":
            return _parse_wav(data)
        raise UnreadableAudio(f"The clip is a RIFF file of form type {_show(form)}, not WAVE audio.")
    if data[:4] == b"fLaC":
        return _parse_flac(data)
    raise _other_error(data)


def _other_error(data: bytes) -> UnsupportedAudio | UnreadableAudio:
    """The error for bytes that are neither RIFF/WAVE nor FLAC: unsupported if audio, else unreadable."""
    for offset, signature, name in _OTHER_AUDIO_SIGNATURES:
        if data[offset : offset + len(signature)] == signature:
            return UnsupportedAudio(
                f"The clip is {name} audio; send WAV (16/24-bit PCM or 32-bit float) or FLAC (16/24-bit)."
            )
    if data[:4] == b"FORM" and data[8:12] in (b"AIFF", b"AIFC", b"8SVX", b"16SV"):
        return UnsupportedAudio(
            f"The clip is {_show(data[8:12])} audio (IFF); send WAV (16/24-bit PCM or "
            "32-bit float) or FLAC (16/24-bit)."
        )
    try:
        info = sf.info(io.BytesIO(data))
    except (sf.SoundFileError, RuntimeError, ValueError, TypeError):
        return UnreadableAudio(
            f"The clip's {len(data)} bytes are not recognisable as audio (they begin "
            f"{_show(data[:8])}); send a WAV or FLAC file."
        )
    return UnsupportedAudio(
        f"The clip is {info.format} audio ({info.subtype}); send WAV (16/24-bit PCM or "
        "32-bit float) or FLAC (16/24-bit)."
    )


def _show(raw: bytes) -> str:
    if raw and all(32 <= b < 127 for b in raw):
        return repr(raw.decode("ascii"))
    return "0x" + raw.hex()


# ---------------------------------------------------------------------------------------
# RIFF/WAVE


def _walk_riff(data: bytes) -> list[tuple[bytes, int, int]]:
    """Return (id, payload offset, payload size) for each chunk inside the RIFF/WAVE chunk."""
    riff_size = struct.unpack_from("<I", data, 4)[0]
    riff_end = 8 + riff_size
    if riff_end > len(data):
        raise UnreadableAudio(
            f"The RIFF header declares {riff_size} bytes after its first 8, so a "
            f"{riff_end}-byte file, but the clip has {len(data)} bytes; it looks truncated."
        )
    allowed_tail = 1 if riff_size % 2 else 0  # the RIFF chunk's own pad byte
    if len(data) - riff_end > allowed_tail:
        raise UnreadableAudio(
            f"The clip has {len(data) - riff_end} bytes after the end of its RIFF chunk "
            f"(RIFF size {riff_size}, file {len(data)} bytes); send exactly one WAV file."
        )
    chunks: list[tuple[bytes, int, int]] = []
    pos = 12
    while pos < riff_end:
        if riff_end - pos < 8:
            raise UnreadableAudio(
                f"The WAV file has {riff_end - pos} stray bytes at offset {pos}, too few "
                "for a chunk header; the RIFF size or a chunk size is wrong."
            )
        chunk_id = data[pos : pos + 4]
        size = struct.unpack_from("<I", data, pos + 4)[0]
        if not all(32 <= b < 127 for b in chunk_id):
            raise UnreadableAudio(
                f"The WAV file has a chunk id {_show(chunk_id)} at offset {pos} that is not "
                "four ASCII characters; a previous chunk size or pad byte is wrong."
            )
        payload = pos + 8
        if payload + size > riff_end:
            raise UnreadableAudio(
                f"The WAV {_show(chunk_id)} chunk at offset {pos} declares {size} bytes but "
                f"only {riff_end - payload} remain in the RIFF chunk; the file looks "
                "truncated or the size is wrong."
            )
        chunks.append((chunk_id, payload, size))
        pos = payload + size + (size % 2)
    # pos may exceed riff_end by one: the last chunk's pad byte missing at the end of the file.
    return chunks


def _parse_wav(data: bytes) -> _Header:
    chunks = _walk_riff(data)
    ids = [c[0] for c in chunks]
    for wanted in (b"fmt ", b"data"):
        count = ids.count(wanted)
        if count == 0:
            raise UnreadableAudio(
                f"The WAV file has no {_show(wanted)} chunk (chunks found: "
                f"{', '.join(_show(i) for i in ids) or 'none'})."
            )
        if count > 1:
            raise UnreadableAudio(
                f"The WAV file has {count} {_show(wanted)} chunks; it must have exactly one."
            )
    if ids.index(b"fmt ") > ids.index(b"data"):
        raise UnreadableAudio(
            "The WAV file's 'fmt ' chunk comes after its 'data' chunk; the RIFF/WAVE "
            "specification requires it before."
        )
    _, fmt_at, fmt_size = chunks[ids.index(b"fmt ")]
    _, _, data_size = chunks[ids.index(b"data")]
    if fmt_size < 16:
        raise UnreadableAudio(f"The WAV 'fmt ' chunk is {fmt_size} bytes; it needs at least 16.")
    tag, channels, rate, byte_rate, block_align, bits = struct.unpack_from("<HHIIHH", data, fmt_at)
    if channels == 0:
        raise UnreadableAudio("The WAV header declares 0 channels.")
    if rate == 0:
        raise UnreadableAudio("The WAV header declares a sample rate of 0 Hz.")

    kind, valid_bits = _wav_encoding(data, fmt_at, fmt_size, tag, bits)
    subtype = _wav_subtype(kind, bits)
    if valid_bits is not None and valid_bits != bits:
        if valid_bits == 0 or valid_bits > bits:
            raise UnreadableAudio(
                f"The WAV extensible header declares {valid_bits} valid bits in {bits}-bit samples."
            )
        raise UnsupportedAudio(
            f"The WAV file declares {valid_bits} valid bits in {bits}-bit samples; only "
            "samples using their full width are accepted."
        )

    expected_align = channels * bits // 8
    if block_align != expected_align:
        raise UnreadableAudio(
            f"The WAV header's block align is {block_align} but {channels} channel(s) of "
            f"{bits}-bit samples need {expected_align}."
        )
    if byte_rate != rate * block_align:
        raise UnreadableAudio(
            f"The WAV header's byte rate is {byte_rate} but {rate} Hz times block align "
            f"{block_align} is {rate * block_align}."
        )
    if data_size % block_align:
        raise UnreadableAudio(
            f"The WAV data chunk is {data_size} bytes, not a whole number of {block_align}-byte frames."
        )
    return _Header(
        format="WAV",
        subtype=subtype,
        bits=bits,
        channels=channels,
        sample_rate_hz=rate,
        frames=data_size // block_align,
    )


def _wav_encoding(data: bytes, fmt_at: int, fmt_size: int, tag: int, bits: int) -> tuple[str, int | None]:
    """Return ("pcm" | "float", valid bits or None) or raise for encodings we refuse."""
    if tag == _WAVE_FORMAT_PCM:
        return "pcm", None
    if tag == _WAVE_FORMAT_IEEE_FLOAT:
        return "float", None
    if tag == _WAVE_FORMAT_EXTENSIBLE:
        if fmt_size < 40:
            raise UnreadableAudio(
                f"The WAV header says WAVE_FORMAT_EXTENSIBLE but its 'fmt ' chunk is "
                f"{fmt_size} bytes; it needs 40."
            )
        cb_size, valid_bits = struct.unpack_from("<HH", data, fmt_at + 16)
        if cb_size < 22:
            raise UnreadableAudio(f"The WAV extensible header's extension size is {cb_size}; it needs 22.")
        guid = data[fmt_at + 24 : fmt_at + 40]
        if guid[2:] == _GUID_TAIL:
            sub_tag = struct.unpack_from("<H", guid)[0]
            if sub_tag == _WAVE_FORMAT_PCM:
                return "pcm", valid_bits
            if sub_tag == _WAVE_FORMAT_IEEE_FLOAT:
                return "float", valid_bits
            name = _WAV_TAG_NAMES.get(sub_tag, f"format 0x{sub_tag:04X}")
            raise UnsupportedAudio(
                f"The WAV file is {name} (extensible sub-format); send 16/24-bit PCM or 32-bit float."
            )
        raise UnsupportedAudio(f"The WAV extensible sub-format GUID {guid.hex()} is not PCM or IEEE float.")
    name = _WAV_TAG_NAMES.get(tag, f"format tag 0x{tag:04X}")
    raise UnsupportedAudio(f"The WAV file is {name} encoded; send 16/24-bit PCM or 32-bit float.")


def _wav_subtype(kind: str, bits: int) -> str:
    if kind == "pcm" and bits in (16, 24):
        return f"PCM_{bits}"
    if kind == "float" and bits == 32:
        return "FLOAT"
    what = f"{bits}-bit integer PCM" if kind == "pcm" else f"{bits}-bit float"
    raise UnsupportedAudio(f"The WAV file holds {what}; send 16/24-bit PCM or 32-bit float.")


# ---------------------------------------------------------------------------------------
# FLAC


def _parse_flac(data: bytes) -> _Header:
    pos = 4
    first = True
    streaminfo: bytes | None = None
    while True:
        if len(data) < pos + 4:
            raise UnreadableAudio(
                f"The FLAC stream ends at byte {len(data)} inside its metadata; it looks truncated."
            )
        last = bool(data[pos] & 0x80)
        block_type = data[pos] & 0x7F
        length = int.from_bytes(data[pos + 1 : pos + 4], "big")
        if block_type == 127:
            raise UnreadableAudio(f"The FLAC metadata block at offset {pos} has the invalid type 127.")
        if first and (block_type != 0 or length != 34):
            raise UnreadableAudio(
                f"The FLAC stream's first metadata block is type {block_type} of {length} "
                "bytes; it must be STREAMINFO (type 0, 34 bytes)."
            )
        if pos + 4 + length > len(data):
            raise UnreadableAudio(
                f"The FLAC metadata block at offset {pos} declares {length} bytes but only "
                f"{len(data) - pos - 4} remain; the file looks truncated."
            )
        if first:
            streaminfo = data[pos + 4 : pos + 4 + length]
        first = False
        pos += 4 + length
        if last:
            break
    assert streaminfo is not None
    packed = int.from_bytes(streaminfo[10:18], "big")
    rate = packed >> 44
    channels = ((packed >> 41) & 0x7) + 1
    bits = ((packed >> 36) & 0x1F) + 1
    total = packed & ((1 << 36) - 1)
    md5 = streaminfo[18:34]
    if rate == 0:
        raise UnreadableAudio("The FLAC STREAMINFO declares a sample rate of 0 Hz.")
    if bits not in (16, 24):
        raise UnsupportedAudio(f"The FLAC stream holds {bits}-bit samples; send 16 or 24-bit FLAC.")
    if total == 0:
        # "Unknown length", as a streaming encoder leaves it: libsndfile cannot find the end
        # of such a stream reliably, and truncation could not be told from the end.
        raise UnreadableAudio(
            "The FLAC STREAMINFO gives the total number of samples as 0 (unknown); let the "
            "encoder finish the file so that it records the length."
        )
    return _Header(
        format="FLAC",
        subtype=f"PCM_{bits}",
        bits=bits,
        channels=channels,
        sample_rate_hz=rate,
        frames=total,
        flac_md5=md5 if any(md5) else None,
    )


# ---------------------------------------------------------------------------------------
# Decoding and levels


def _check_mono(header: _Header) -> None:
    if header.channels != 1:
        raise UnsupportedChannels(f"The clip has {header.channels} channels; send mono (1 channel) audio.")


def _decode(data: bytes, header: _Header, max_frames: int) -> tuple[np.ndarray, bool]:
    """Decode as float32, shape (frames, channels), and check the result against the header.

    Reads at most ``max_frames + 1`` frames, so a small FLAC that expands to hours of audio
    cannot exhaust memory; returns (samples, complete), complete False when it stopped there.
    """
    dtype = "int32" if header.flac_md5 is not None else "float32"
    parts: list[np.ndarray] = []
    total = 0
    try:
        with sf.SoundFile(io.BytesIO(data)) as f:
            lib_format, lib_subtype = f.format, f.subtype
            lib_rate, lib_channels = f.samplerate, f.channels
            while total <= max_frames:
                want = min(_READ_BLOCK_FRAMES, max_frames + 1 - total)
                part = f.read(want, dtype=dtype, always_2d=True)
                if part.shape[0]:
                    parts.append(part)
                    total += part.shape[0]
                if part.shape[0] < want:
                    break
    except (sf.SoundFileError, RuntimeError, ValueError, TypeError, MemoryError) as exc:
        raise UnreadableAudio(
            f"The {header.format} clip failed to decode ({_short(exc)}); it looks damaged or truncated."
        ) from None
    expected_format = ("WAV", "WAVEX") if header.format == "WAV" else ("FLAC",)
    if (
        lib_format not in expected_format
        or lib_subtype != header.subtype
        or lib_rate != header.sample_rate_hz
        or lib_channels != header.channels
    ):
        raise UnreadableAudio(
            f"The clip's header says {header.format} {header.subtype}, {header.sample_rate_hz} "
            f"Hz, {header.channels} channel(s), but it decodes as {lib_format} {lib_subtype}, "
            f"{lib_rate} Hz, {lib_channels} channel(s)."
        )
    decoded = np.concatenate(parts) if parts else np.zeros((0, header.channels), dtype=dtype)
    if total > max_frames:
        return _as_float(decoded), False
    ints = decoded if dtype == "int32" else None
    samples = _as_float(decoded)
    frames = samples.shape[0]
    if frames != header.frames:
        raise UnreadableAudio(
            f"The clip's header declares {header.frames} frames but {frames} decode; it looks "
            "truncated or damaged."
        )
    if ints is not None and header.flac_md5 is not None:
        # libsndfile returns samples left-justified in int32; the FLAC MD5 covers the samples
        # at their own width, little-endian, interleaved.
        shifted = (ints >> (32 - header.bits)).reshape(-1)
        if header.bits == 16:
            raw = shifted.astype("<i2").tobytes()
        else:
            raw = shifted.astype("<i4").view(np.uint8).reshape(-1, 4)[:, :3].tobytes()
        if hashlib.md5(raw, usedforsecurity=False).digest() != header.flac_md5:
            raise UnreadableAudio(
                "The FLAC audio does not match the MD5 signature in its STREAMINFO; it is damaged."
            )
    return samples, True


def _as_float(decoded: np.ndarray) -> np.ndarray:
    if decoded.dtype == np.int32:
        return decoded.astype(np.float32) * np.float32(2.0**-31)
    return decoded


def _short(exc: Exception) -> str:
    text = str(exc).split(": ")[-1].strip().rstrip(".")
    return text[:120] or type(exc).__name__


def _levels(x: np.ndarray, header: _Header) -> tuple[float, float, float]:
    if x.size == 0:
        return LEVEL_FLOOR_DBFS, LEVEL_FLOOR_DBFS, 0.0
    # Straight on the float32 samples, with no float64 copy: the extremes are exact as they are,
    # the sum of squares accumulates in float64, and einsum (not dot) starts no BLAS threads.
    peak = max(float(x.max()), -float(x.min()))
    rms = math.sqrt(float(np.einsum("i,i->", x, x, dtype=np.float64)) / x.size)
    # One LSB of a b-bit code is 2**-(b-1) of full scale; the largest positive code is
    # 1 - LSB, so "within one LSB of full scale" is |x| >= 1 - 2 LSB. Float clips use the
    # 24-bit step (float32 carries a 24-bit significand, so the threshold is exact in it).
    lsb = 2.0 ** -((24 if header.subtype == "FLOAT" else header.bits) - 1)
    threshold = np.float32(1.0 - 2.0 * lsb)
    clipped = float(np.count_nonzero(x >= threshold) + np.count_nonzero(x <= -threshold)) / x.size
    return _dbfs(peak), _dbfs(rms), clipped


def _dbfs(value: float) -> float:
    if value <= 0.0:
        return LEVEL_FLOOR_DBFS
    return max(20.0 * math.log10(value), LEVEL_FLOOR_DBFS)
