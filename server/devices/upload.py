"""Streaming multipart reader for alert uploads: the clip part goes to disk, counted as it comes.

The framework caps form fields but not file parts, so this reader enforces the clip limit while
streaming: an oversized upload is never held whole in memory.
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from dataclasses import dataclass, field

from python_multipart.exceptions import MultipartParseError
from python_multipart.multipart import MultipartParser, parse_options_header

from server.devices.clipstore import ClipStore, SpooledUpload
from server.errors import ClipTooLarge, InvalidRequest, MalformedMultipart, NotMultipart

META_LIMIT = 64 * 1024
OTHER_PARTS_LIMIT = 256 * 1024


@dataclass
class AlertUpload:
    meta: bytes | None = None
    clip: SpooledUpload | None = None
    _other_bytes: int = 0
    parts: list[str] = field(default_factory=list)


@dataclass
class _PartState:
    """Where the parser is: the current part's name, its headers so far, the meta buffer."""

    name: str | None = None
    buf: bytearray | None = None
    hname: bytes = b""
    hval: bytes = b""
    headers: dict[bytes, bytes] = field(default_factory=dict)
    ended: bool = False


def boundary_of(content_type: str) -> bytes:
    ctype, params = parse_options_header(content_type or "")
    if ctype != b"multipart/form-data":
        raise NotMultipart(
            "Send the alert as multipart/form-data with a 'meta' part (JSON) and a 'clip' part (audio)."
        )
    boundary = params.get(b"boundary")
    if not boundary:
        raise MalformedMultipart("The multipart Content-Type has no boundary parameter.")
    return boundary


async def read_alert_upload(
    stream: AsyncIterator[bytes], content_type: str, store: ClipStore, max_clip_bytes: int
) -> AlertUpload:
    """Parse the body; the caller must ``discard()`` the clip spool when done."""
    boundary = boundary_of(content_type)
    result = AlertUpload()
    state = _PartState()
    errors: list[Exception] = []

    def on_part_begin() -> None:
        state.headers = {}
        state.name = None

    def on_header_field(data: bytes, start: int, end: int) -> None:
        state.hname += data[start:end]

    def on_header_value(data: bytes, start: int, end: int) -> None:
        state.hval += data[start:end]

    def on_header_end() -> None:
        state.headers[state.hname.lower()] = state.hval
        state.hname, state.hval = b"", b""

    def on_headers_finished() -> None:
        disp, params = parse_options_header(state.headers.get(b"content-disposition", b""))
        name = params.get(b"name", b"").decode("utf-8", "replace")
        state.name = name
        result.parts.append(name)
        if name == "clip":
            if result.clip is not None:
                errors.append(InvalidRequest("The form has more than one 'clip' part; send one."))
                return
            result.clip = store.spool()
        elif name == "meta":
            if result.meta is not None:
                errors.append(InvalidRequest("The form has more than one 'meta' part; send one."))
                return
            state.buf = bytearray()

    def on_part_data(data: bytes, start: int, end: int) -> None:
        if errors:
            return
        chunk = data[start:end]
        name = state.name
        if name == "clip" and result.clip is not None:
            if result.clip.size + len(chunk) > max_clip_bytes:
                errors.append(
                    ClipTooLarge(
                        f"The clip is larger than the limit of {max_clip_bytes / 1048576:.1f} MiB "
                        f"({max_clip_bytes} bytes)."
                    )
                )
                return
            result.clip.write(chunk)
        elif name == "meta":
            buf = state.buf
            assert buf is not None  # set when the meta part's headers ended
            if len(buf) + len(chunk) > META_LIMIT:
                errors.append(InvalidRequest(f"The 'meta' part is larger than {META_LIMIT // 1024} KiB."))
                return
            buf.extend(chunk)
        else:
            result._other_bytes += len(chunk)
            if result._other_bytes > OTHER_PARTS_LIMIT:
                errors.append(InvalidRequest("The form carries too much besides 'meta' and 'clip'."))

    def on_part_end() -> None:
        if state.name == "meta" and state.buf is not None and result.meta is None:
            result.meta = bytes(state.buf)
            state.buf = None

    def on_end() -> None:
        state.ended = True

    parser = MultipartParser(
        boundary,
        {
            "on_end": on_end,
            "on_part_begin": on_part_begin,
            "on_header_field": on_header_field,
            "on_header_value": on_header_value,
            "on_header_end": on_header_end,
            "on_headers_finished": on_headers_finished,
            "on_part_data": on_part_data,
            "on_part_end": on_part_end,
        },
    )
    try:
        async for chunk in stream:
            if chunk:
                parser.write(chunk)
            if errors:
                break
        if not errors:
            parser.finalize()
    except MultipartParseError as exc:
        if result.clip:
            result.clip.discard()
        raise MalformedMultipart(f"The multipart body could not be parsed ({exc}).") from exc
    except BaseException:
        if result.clip:
            result.clip.discard()
        raise
    if errors:
        if result.clip:
            result.clip.discard()
        raise errors[0]
    if not state.ended and result.parts:
        # The parser accepts a body cut off before its closing delimiter (RFC 2046 section 5.1.1);
        # a part that never ended may be incomplete, so none of it is used.
        if result.clip:
            result.clip.discard()
        raise MalformedMultipart(
            "The multipart body ends before its closing boundary; was the upload cut short?"
        )
    if result.meta is None or result.clip is None:
        if result.clip:
            result.clip.discard()
        missing = [n for n, v in (("meta", result.meta), ("clip", result.clip)) if v is None]
        if not result.parts:
            raise MalformedMultipart("The multipart body holds no parts (is the boundary right?).")
        raise InvalidRequest(
            f"The form has no '{missing[0]}' part; send 'meta' (JSON) and 'clip' (audio).", field=missing[0]
        )
    return result
