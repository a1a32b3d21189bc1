"""On-disk layout of labwatch recordings (format ``lwrec`` v1): constants, errors, the
record and header types, and the encode/decode functions shared by writer and reader.

Byte layout (little-endian; full specification in ``docs/recording-format.md``)::

    file header   magic(8) version u16, flags u16, created_wall f64, created_mono f64,
                  metadata_len u32, metadata JSON (UTF-8), CRC-32 u32 of all before it
    record        sync marker(4), body_len u32, kind u8, reserved(3),
                  head CRC-32 u32 of the 12 bytes before it,
                  body: received_wall f64, received_mono f64, n_frames u32, text_len u32,
                        text (UTF-8), n_frames x frame length u32, frame bytes,
                  record CRC-32 u32 of everything before it in the record
"""

from __future__ import annotations

import json
import math
import struct
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from labwatch import __version__

__all__ = [
    "DEFAULT_MAX_RECORD_BYTES",
    "FORMAT_VERSION",
    "MAGIC",
    "MAX_METADATA_BYTES",
    "RECORD_KINDS",
    "SYNC_MARKER",
    "NotARecordingError",
    "Record",
    "RecordInputError",
    "RecordingError",
    "RecordingExistsError",
    "RecordingFormatError",
    "RecordingHeader",
    "UnsupportedVersionError",
]

#: 7-bit or newline-translating transfers (common practice, no source).
MAGIC = b"\x8alwrec\r\n"
#: Format version written by this module; the only one it reads.
FORMAT_VERSION = 1
#: Marker that starts every record; the reader resynchronises on it after damage.
SYNC_MARKER = b"\x1eLWr"
#: Record kinds, in the order of their on-disk codes 1, 2, 3.
RECORD_KINDS = ("accepted", "rejected", "annotation")

#: Largest record body (bytes) the writer stores and the reader accepts by default.
DEFAULT_MAX_RECORD_BYTES = 64 * 1024 * 1024
#: Cap on the JSON metadata in the file header.
MAX_METADATA_BYTES = 1024 * 1024

_KIND_CODES = {kind: code for code, kind in enumerate(RECORD_KINDS, start=1)}
_CODE_KINDS = {code: kind for kind, code in _KIND_CODES.items()}

# File header: magic, version, flags, created_wall, created_mono, metadata length.
_FILE_HEAD = struct.Struct("<8sHHddI")
# Record header: sync, body length, kind, 3 reserved bytes, then CRC-32 of those 12 bytes.
_REC_HEAD12 = struct.Struct("<4sIB3x")
_REC_HEAD = struct.Struct("<4sIB3xI")
# Record body prefix: received_wall, received_mono, frame count, text length.
_BODY_FIXED = struct.Struct("<ddII")
_U32 = struct.Struct("<I")

_HEAD_SIZE = _REC_HEAD.size  # 16
_CRC_SIZE = _U32.size  # 4
_OVERHEAD = _HEAD_SIZE + _CRC_SIZE  # bytes of a record besides its body
_TEXT_ERRORS = "surrogatepass"  # any Python str round-trips


# ----------------------------------------------------------------------------- errors


class RecordingError(OSError):
    """Writing a recording failed (disk full, I/O error, unwritable path).

    ``errno``, ``strerror`` and ``filename`` are those of the underlying ``OSError``.
    """


class RecordingExistsError(RecordingError, FileExistsError):
    """The writer refuses to open an existing regular file (it never appends or overwrites)."""


class RecordInputError(ValueError):
    """Bad argument to :class:`RecordWriter` (frames not bytes, non-finite time, too large)."""


class RecordingFormatError(ValueError):
    """The file is not a readable recording (damaged or incomplete file header)."""


class NotARecordingError(RecordingFormatError):
    """The file does not start with the recording magic bytes."""


class UnsupportedVersionError(RecordingFormatError):
    """The recording was written in a format version this reader does not know."""


# ---------------------------------------------------------------------------- results


@dataclass(frozen=True)
class RecordingHeader:
    """File header of a recording.

    Attributes
    ----------
    version : int
        Format version (always :data:`FORMAT_VERSION` for a header that was read).
    created_wall : float
        Creation time, Unix seconds (``time.time()`` of the writer).
    created_mono : float
        ``time.monotonic()`` of the writer at creation, seconds; relates the records'
        monotonic stamps to ``created_wall``.
    metadata_json : str
        The free-form JSON metadata object as stored.
    size : int
        Header length in bytes; the first record starts at this offset.
    """

    version: int
    created_wall: float
    created_mono: float
    metadata_json: str
    size: int

    @property
    def metadata(self) -> dict[str, Any]:
        """The metadata parsed into a fresh ``dict``."""
        return json.loads(self.metadata_json)


@dataclass(frozen=True, repr=False)
class Record:
    """One record read back from a recording.

    Attributes
    ----------
    index : int
        0-based position among the intact records of the file.
    offset : int
        Byte offset of the record in the file.
    length : int
        Record length in bytes, framing included.
    kind : str
        One of :data:`RECORD_KINDS`: ``"accepted"``, ``"rejected"`` or ``"annotation"``.
    received_wall : float
        Wall-clock receive time, Unix seconds.
    received_mono : float
        Monotonic receive time, seconds (``time.monotonic()`` of the recording process).
    frames : tuple of bytes
        The message frames exactly as received; empty for annotations.
    rejected_reason : str or None
        Why the monitor rejected the message (rejected records only).
    annotation : str or None
        The annotation text (annotation records only).
    """

    index: int
    offset: int
    length: int
    kind: str
    received_wall: float
    received_mono: float
    frames: tuple[bytes, ...]
    rejected_reason: str | None
    annotation: str | None

    def __repr__(self) -> str:
        extra = ""
        if self.rejected_reason is not None:
            extra = f", rejected_reason={self.rejected_reason!r}"
        if self.annotation is not None:
            extra = f", annotation={self.annotation!r}"
        sizes = ", ".join(str(len(f)) for f in self.frames)
        return (
            f"Record(index={self.index}, kind={self.kind!r}, offset={self.offset}, "
            f"received_wall={self.received_wall!r}, frame_bytes=[{sizes}]{extra})"
        )


# --------------------------------------------------------------------------- encoding


def encode_header(metadata: Mapping[str, Any] | None, wall: float, mono: float) -> bytes:
    """Encoded file header; ``"software"`` is added to the metadata unless present."""
    meta = dict(metadata) if metadata is not None else {}
    meta.setdefault("software", f"labwatch {__version__}")
    try:
        text = json.dumps(meta, allow_nan=False, ensure_ascii=False, separators=(",", ":"))
    except (TypeError, ValueError) as exc:
        raise RecordInputError(f"metadata must be JSON-serialisable, got {meta!r}: {exc}") from None
    blob = text.encode("utf-8", _TEXT_ERRORS)
    if len(blob) > MAX_METADATA_BYTES:
        raise RecordInputError(
            f"metadata is {len(blob)} bytes as JSON, the cap is {MAX_METADATA_BYTES}"
        )
    head = _FILE_HEAD.pack(MAGIC, FORMAT_VERSION, 0, wall, mono, len(blob)) + blob
    return head + _U32.pack(zlib.crc32(head))


_SIZE_STRUCTS: dict[int, struct.Struct] = {}


def _sizes_struct(n: int) -> struct.Struct:
    st = _SIZE_STRUCTS.get(n)
    if st is None:
        st = struct.Struct(f"<{n}I")
        if len(_SIZE_STRUCTS) < 256:
            _SIZE_STRUCTS[n] = st
    return st


def _frame_size(i: int, frame: Any) -> tuple[int, Any]:
    """Size of a frame that is not ``bytes``/``bytearray``, and a joinable form of it."""
    if isinstance(frame, str):
        raise RecordInputError(f"frame {i} is a str ({frame[:40]!r}); frames must be bytes")
    try:
        view = memoryview(frame)
    except TypeError:
        raise RecordInputError(
            f"frame {i} is a {type(frame).__name__} ({frame!r:.60}), not a bytes-like object"
        ) from None
    if not view.c_contiguous:
        return view.nbytes, view.tobytes()
    return view.nbytes, view


def encode_record(
    kind: str, frames: Sequence[Any], wall: float, mono: float, text: bytes, cap: int
) -> bytes:
    """One encoded record of ``kind``; frames are any bytes-like objects."""
    if type(frames) is not list and type(frames) is not tuple:
        frames = tuple(frames)
    sizes = []
    append = sizes.append
    parts = None
    for i, frame in enumerate(frames):
        t = type(frame)
        if t is bytes or t is bytearray:
            append(len(frame))
            continue
        size, joinable = _frame_size(i, frame)
        append(size)
        if joinable is not frame:
            if parts is None:
                parts = list(frames)
            parts[i] = joinable
    n = len(sizes)
    body_len = _BODY_FIXED.size + len(text) + 4 * n + sum(sizes)
    if body_len > cap:
        raise RecordInputError(f"record body of {body_len} bytes exceeds max_record_bytes={cap}")
    head12 = _REC_HEAD12.pack(SYNC_MARKER, body_len, _KIND_CODES[kind])
    prefix = b"".join(
        (
            head12,
            _U32.pack(zlib.crc32(head12)),
            _BODY_FIXED.pack(wall, mono, n, len(text)),
            text,
            _sizes_struct(n).pack(*sizes),
        )
    )
    if parts is None:
        parts = frames
    if body_len < 16384:  # small: fewer calls beat fewer copies
        rec = b"".join((prefix, *parts))
        return rec + _U32.pack(zlib.crc32(rec))
    # large: one pass over the frames for the CRC and a single copy into the record
    crc = zlib.crc32(prefix)
    for part in parts:
        crc = zlib.crc32(part, crc)
    return b"".join((prefix, *parts, _U32.pack(crc)))


def check_time(name: str, value: Any) -> float:
    """``value`` as a finite float of seconds, or :class:`RecordInputError`."""
    try:
        out = float(value)
    except (TypeError, ValueError):
        raise RecordInputError(f"{name} must be a number of seconds, got {value!r}") from None
    if not math.isfinite(out):
        raise RecordInputError(f"{name} must be finite, got {value!r}")
    return out


def parse_body(kind: str, data: bytes, start: int, end: int) -> tuple[Any, ...] | str:
    """Decode the checksummed record body ``data[start:end]``, or return why it is malformed.

    Returns ``(kind, received_wall, received_mono, frames, text)`` with ``text`` ``None``
    for accepted messages.
    """
    if end - start < _BODY_FIXED.size:
        return f"record body of {end - start} bytes is shorter than its fixed part"
    wall, mono, n, text_len = _BODY_FIXED.unpack_from(data, start)
    text_at = start + _BODY_FIXED.size
    at = text_at + text_len
    if at + 4 * n > end:
        return f"record body too short for {n} frames and {text_len} text bytes"
    sizes = _sizes_struct(n).unpack_from(data, at)
    at += 4 * n
    if at + sum(sizes) != end:
        return "frame lengths do not add up to the record length"
    if kind == "accepted":
        if text_len:
            return "accepted record carries a text field"
        text = None
    else:
        if kind == "annotation" and n:
            return "annotation record carries frames"
        try:
            text = data[text_at : text_at + text_len].decode("utf-8", _TEXT_ERRORS)
        except UnicodeDecodeError as exc:
            return f"record text is not UTF-8: {exc}"
    frames = []
    for size in sizes:
        frames.append(data[at : at + size])
        at += size
    return kind, wall, mono, tuple(frames), text
