"""Reader of labwatch recordings: every intact record, damage reports, never a crash.

A record length is used only after its record-header CRC matched, and never beyond the end
of the file or ``max_record_bytes``, so a corrupted length cannot make the reader allocate
gigabytes.  Damaged records in the middle are reported and skipped (by their length when
their header is intact, otherwise by scanning for the next sync marker whose header CRC
matches); the end of the file is described by a :class:`TailReport`.
"""

from __future__ import annotations

import json
import os
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from types import TracebackType
from typing import Any

from labwatch.recording_format import (
    _CODE_KINDS,
    _CRC_SIZE,
    _FILE_HEAD,
    _HEAD_SIZE,
    _OVERHEAD,
    _REC_HEAD,
    _TEXT_ERRORS,
    _U32,
    DEFAULT_MAX_RECORD_BYTES,
    FORMAT_VERSION,
    MAGIC,
    MAX_METADATA_BYTES,
    SYNC_MARKER,
    NotARecordingError,
    Record,
    RecordingFormatError,
    RecordingHeader,
    RecordInputError,
    UnsupportedVersionError,
    parse_body,
)

__all__ = [
    "TAIL_STATUSES",
    "DamagedRegion",
    "RecordReader",
    "Recording",
    "TailReport",
    "read_records",
]

#: Possible values of :attr:`TailReport.status`.
TAIL_STATUSES = ("clean", "truncated", "corrupt")

_READ_CHUNK = 1024 * 1024


@dataclass(frozen=True)
class DamagedRegion:
    """Bytes in the middle of a recording that did not read back as an intact record.

    Attributes
    ----------
    offset : int
        Byte offset where the damage starts.
    length : int
        Number of bytes skipped.
    reason : str
        What was wrong (checksum mismatch, unrecognised bytes, ...).
    """

    offset: int
    length: int
    reason: str


@dataclass(frozen=True)
class TailReport:
    """State of the end of a recording.

    Attributes
    ----------
    status : str
        ``"clean"`` (the file ends exactly after an intact record or the header),
        ``"truncated"`` (the file ends inside a record: power loss, kill, copy cut short)
        or ``"corrupt"`` (bytes after the last intact record that are no record at all,
        e.g. a zero-filled tail).
    offset : int
        Byte offset where the damaged tail starts; equals ``file_size`` when clean.
    bytes_lost : int
        ``file_size - offset``.
    file_size : int
        Size of the file as read, bytes.
    reason : str
        Human-readable explanation.
    """

    status: str
    offset: int
    bytes_lost: int
    file_size: int
    reason: str

    @property
    def clean(self) -> bool:
        """True when nothing was lost at the end of the file."""
        return self.status == "clean"


@dataclass(frozen=True)
class Recording:
    """Everything :func:`read_records` found in a file."""

    header: RecordingHeader
    records: tuple[Record, ...]
    damaged: tuple[DamagedRegion, ...]
    tail: TailReport

    @property
    def intact(self) -> bool:
        """True when no record was damaged and the tail is clean."""
        return not self.damaged and self.tail.clean


class _Window:
    """Random access to a file of known size through one chunk-sized read buffer."""

    def __init__(self, fh: Any, size: int) -> None:
        self._fh = fh
        self.size = size
        self._base = 0
        self._data = b""
        self._view = memoryview(b"")

    def load(self, pos: int, n: int) -> tuple[bytes, int, int]:
        """``(data, off, avail)``: file bytes ``[pos, pos + avail)`` are
        ``data[off : off + avail]``, with ``avail == n`` unless the file ends first."""
        n = max(0, min(n, self.size - pos))
        off = pos - self._base
        if off < 0 or off + n > len(self._data):
            self._fh.seek(pos)
            self._data = self._fh.read(max(n, _READ_CHUNK))
            self._view = memoryview(self._data)
            self._base = pos
            off = 0
            if len(self._data) < n:  # the file shrank after it was opened
                self.size = pos + len(self._data)
                n = len(self._data)
        return self._data, off, n

    def get(self, pos: int, n: int) -> memoryview:
        """Bytes ``[pos, pos + n)``, fewer at the end of the file."""
        _, off, n = self.load(pos, n)
        return self._view[off : off + n]

    def view(self) -> memoryview:
        """A memoryview of the data returned by the last :meth:`load`."""
        return self._view

    def find(self, needle: bytes, pos: int) -> int:
        """Absolute offset of the first ``needle`` at or after ``pos``, or -1."""
        k = len(needle)
        while pos <= self.size - k:
            self.get(pos, min(_READ_CHUNK, self.size - pos))
            i = self._data.find(needle, pos - self._base)
            if i >= 0:
                return self._base + i
            pos = self._base + len(self._data) - (k - 1)
        return -1

    def all_zero(self, pos: int) -> bool:
        while pos < self.size:
            chunk = self.get(pos, _READ_CHUNK)
            if chunk.tobytes().strip(b"\x00"):
                return False
            pos += len(chunk)
        return True


# Probe outcomes
_OK, _SKIP, _TRUNC, _INVALID = range(4)


class RecordReader:
    """Read a recording: the header at once, then records by iteration.

    Parameters
    ----------
    path : str or os.PathLike
        Recording file.  It is read as it is when opened (a file still being written
        reads as one whose tail may be truncated).
    max_record_bytes : int
        Records with a larger body are reported as damaged and skipped without being
        read into memory.

    Raises
    ------
    NotARecordingError, UnsupportedVersionError, RecordingFormatError
        Wrong magic bytes, unknown format version, damaged or incomplete file header.
    OSError
        The file cannot be opened.

    Notes
    -----
    Iterating yields every intact :class:`Record` in file order.  After a full
    iteration, :attr:`damaged` lists the damaged regions in the middle of the file and
    :attr:`tail` tells how the file ends.  Reading continues after damage: when a record
    header is intact its length is trusted and only that record is skipped; otherwise
    the reader scans for the next sync marker whose record header checksum matches.

    Examples
    --------
    >>> import os, tempfile
    >>> from labwatch.recording import RecordWriter
    >>> path = os.path.join(tempfile.mkdtemp(), "notes.lwrec")
    >>> with RecordWriter(path, flush_interval_s=0) as w:
    ...     w.annotate("new run started", received_wall=1.0e9, received_mono=5.0)
    0
    >>> with RecordReader(path) as reader:
    ...     [(r.kind, r.annotation) for r in reader], reader.tail.status
    ([('annotation', 'new run started')], 'clean')
    """

    def __init__(
        self, path: str | os.PathLike[str], *, max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES
    ) -> None:
        if (
            isinstance(max_record_bytes, bool)
            or not isinstance(max_record_bytes, int)
            or (max_record_bytes < 1)
        ):
            raise RecordInputError(
                f"max_record_bytes must be a positive integer, got {max_record_bytes!r}"
            )
        self._path = os.fspath(path)
        self._cap = max_record_bytes
        self._fh = open(self._path, "rb")  # noqa: SIM115 - closed in close()
        try:
            self._win = _Window(self._fh, os.fstat(self._fh.fileno()).st_size)
            self.header = self._read_header()
        except BaseException:
            self._fh.close()
            raise
        self._damaged: tuple[DamagedRegion, ...] = ()
        self._tail: TailReport | None = None

    @property
    def path(self) -> str:
        """File being read."""
        return self._path

    @property
    def damaged(self) -> tuple[DamagedRegion, ...]:
        """Damaged regions found by the last iteration (so far)."""
        return self._damaged

    @property
    def tail(self) -> TailReport | None:
        """How the file ends; ``None`` until an iteration has reached the end."""
        return self._tail

    def close(self) -> None:
        """Close the file."""
        self._fh.close()

    def __enter__(self) -> RecordReader:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    # -- header

    def _read_header(self) -> RecordingHeader:
        win, path = self._win, self._path
        fixed = win.get(0, _FILE_HEAD.size).tobytes()
        probe = fixed[: len(MAGIC)]
        if not probe:
            raise RecordingFormatError(f"{path!r} is empty: not a recording (no file header)")
        if probe != MAGIC[: len(probe)]:
            raise NotARecordingError(
                f"{path!r} is not a labwatch recording: it starts with {probe!r}, "
                f"expected {MAGIC!r}"
            )
        if len(fixed) < _FILE_HEAD.size:
            raise RecordingFormatError(
                f"{path!r}: file header incomplete ({win.size} bytes); no records to recover"
            )
        _, version, flags, wall, mono, meta_len = _FILE_HEAD.unpack(fixed)
        if meta_len > MAX_METADATA_BYTES:
            raise RecordingFormatError(
                f"{path!r}: header metadata length {meta_len} exceeds the cap "
                f"{MAX_METADATA_BYTES} (damaged header)"
            )
        total = _FILE_HEAD.size + meta_len + _CRC_SIZE
        if win.size < total:
            raise RecordingFormatError(
                f"{path!r}: file header incomplete ({win.size} of {total} bytes) or damaged; "
                "no records to recover"
            )
        raw = win.get(0, total)
        stored = _U32.unpack(raw[total - _CRC_SIZE :])[0]
        computed = zlib.crc32(raw[: total - _CRC_SIZE])
        if stored != computed:
            raise RecordingFormatError(
                f"{path!r}: file header checksum mismatch (stored {stored:#010x}, "
                f"computed {computed:#010x}): damaged header"
            )
        # The header layout is the same in every format version, so the version is
        # checked only once the checksum has vouched for it.
        if version != FORMAT_VERSION:
            raise UnsupportedVersionError(
                f"{path!r}: recording format version {version}; this reader supports "
                f"version {FORMAT_VERSION}"
            )
        if flags != 0:
            raise UnsupportedVersionError(
                f"{path!r}: header flags {flags:#06x} set; version {FORMAT_VERSION} defines none"
            )
        try:
            text = raw[_FILE_HEAD.size : total - _CRC_SIZE].tobytes().decode("utf-8", _TEXT_ERRORS)
            if not isinstance(json.loads(text), dict):
                raise ValueError("not a JSON object")
        except ValueError as exc:
            raise RecordingFormatError(
                f"{path!r}: header metadata is not a JSON object: {exc}"
            ) from None
        return RecordingHeader(FORMAT_VERSION, wall, mono, text, total)

    # -- records

    def __iter__(self) -> Iterator[Record]:
        win = self._win
        pos = self.header.size
        index = 0
        damaged: list[DamagedRegion] = []
        self._damaged, self._tail = (), None
        while True:
            size = win.size  # shrinks if the file is cut while being read
            if pos >= size:
                self._tail = TailReport("clean", size, 0, size, "file ends on a record boundary")
                break
            outcome, value, end = self._probe(pos)
            if outcome == _OK:
                kind, wall, mono, frames, text = value
                yield Record(
                    index=index,
                    offset=pos,
                    length=end - pos,
                    kind=kind,
                    received_wall=wall,
                    received_mono=mono,
                    frames=frames,
                    rejected_reason=text if kind == "rejected" else None,
                    annotation=text if kind == "annotation" else None,
                )
                index += 1
                pos = end
                continue
            if outcome == _SKIP:
                damaged.append(DamagedRegion(pos, end - pos, value))
                self._damaged = tuple(damaged)
                pos = end
                continue
            if outcome == _TRUNC:
                size = win.size
                self._tail = TailReport("truncated", pos, size - pos, size, value)
                break
            # No record header here: scan for the next plausible one.
            nxt = self._resync(pos + 1)
            if nxt < 0:
                self._tail = self._garbage_tail(pos)
                break
            damaged.append(
                DamagedRegion(
                    pos,
                    nxt - pos,
                    "unrecognised bytes (no intact record header); resumed at the next sync "
                    "marker with an intact record header",
                )
            )
            self._damaged = tuple(damaged)
            pos = nxt
        self._damaged = tuple(damaged)

    def _probe(self, pos: int) -> tuple[int, Any, int]:
        """Classify the bytes at ``pos``: ``(outcome, value, end)``."""
        win = self._win
        remaining = win.size - pos
        data, off, avail = win.load(pos, _HEAD_SIZE)
        if avail < _HEAD_SIZE:
            k = min(len(SYNC_MARKER), avail)
            if data[off : off + k] == SYNC_MARKER[:k]:
                return (
                    _TRUNC,
                    f"file ends inside a record header ({avail} of {_HEAD_SIZE} bytes)",
                    win.size,
                )
            return _INVALID, None, pos
        sync, body_len, code, head_crc = _REC_HEAD.unpack_from(data, off)
        if sync != SYNC_MARKER or zlib.crc32(data[off : off + 12]) != head_crc:
            return _INVALID, None, pos
        total = body_len + _OVERHEAD
        if total > remaining:
            return (
                _TRUNC,
                f"file ends inside a record ({remaining} of {total} bytes present)",
                win.size,
            )
        end = pos + total
        if body_len > self._cap:
            return _SKIP, f"record body of {body_len} bytes exceeds max_record_bytes", end
        data, off, avail = win.load(pos, total)
        if avail < total:
            return _TRUNC, "file shrank while being read", win.size
        body_end = off + total - _CRC_SIZE
        stored = _U32.unpack_from(data, body_end)[0]
        computed = zlib.crc32(win.view()[off:body_end])
        if stored != computed:
            return (
                _SKIP,
                f"record checksum mismatch (stored {stored:#010x}, computed {computed:#010x})",
                end,
            )
        kind = _CODE_KINDS.get(code)
        if kind is None:
            return _SKIP, f"unknown record kind code {code}", end
        parsed = parse_body(kind, data, off + _HEAD_SIZE, body_end)
        if isinstance(parsed, str):
            return _SKIP, parsed, end
        return _OK, parsed, end

    def _resync(self, pos: int) -> int:
        """Offset of the next sync marker at which a record header checks out, or -1."""
        win = self._win
        while True:
            cand = win.find(SYNC_MARKER, pos)
            if cand < 0:
                return -1
            outcome = self._probe(cand)[0]
            if outcome != _INVALID:
                return cand
            pos = cand + 1

    def _garbage_tail(self, pos: int) -> TailReport:
        size = self._win.size
        if self._win.all_zero(pos):
            reason = (
                f"zero-filled tail of {size - pos} bytes after the last intact record "
                "(typical of a power loss before the data reached the disk)"
            )
        else:
            reason = f"{size - pos} unrecognised bytes after the last intact record"
        return TailReport("corrupt", pos, size - pos, size, reason)


def read_records(
    path: str | os.PathLike[str], *, max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES
) -> Recording:
    """Read a whole recording into memory.

    Returns
    -------
    Recording
        Header, intact records, damaged regions and the tail report.

    Raises
    ------
    NotARecordingError, UnsupportedVersionError, RecordingFormatError
        As :class:`RecordReader`.
    """
    with RecordReader(path, max_record_bytes=max_record_bytes) as reader:
        records = tuple(reader)
        assert reader.tail is not None
        return Recording(reader.header, records, reader.damaged, reader.tail)
