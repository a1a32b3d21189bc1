"""Append-only, checksummed recording of every received message, and reading it back.

A recording tees what the monitor receives: each message is an opaque list of byte
frames, stored with its receive times and whether the monitor accepted or rejected it
(and why), so that a replay feeds the monitor exactly what it saw live.  Free-text
annotations ("new run started", notes) can be interleaved.

This module is the public entry point; the parts live in

* :mod:`labwatch.recording_format` -- byte layout, record types, errors,
* :mod:`labwatch.recording_writer` -- :class:`RecordWriter`,
* :mod:`labwatch.recording_reader` -- :class:`RecordReader`, :func:`read_records`.

The format is specified in ``docs/recording-format.md``.

Examples
--------
>>> import os, tempfile
>>> path = os.path.join(tempfile.mkdtemp(), "session.lwrec")
>>> with RecordWriter(path, metadata={"endpoint": "tcp://127.0.0.1:5599"}) as w:
...     _ = w.annotate("new run started", received_wall=1.0e9, received_mono=10.0)
...     _ = w.write([b"counts", b"{}", b""], received_wall=1.0e9 + 1, received_mono=11.0)
>>> rec = read_records(path)
>>> [r.kind for r in rec.records], rec.tail.status, rec.header.metadata["endpoint"]
(['annotation', 'accepted'], 'clean', 'tcp://127.0.0.1:5599')
"""

from __future__ import annotations

from labwatch.recording_format import (
    DEFAULT_MAX_RECORD_BYTES,
    FORMAT_VERSION,
    MAGIC,
    MAX_METADATA_BYTES,
    RECORD_KINDS,
    SYNC_MARKER,
    NotARecordingError,
    Record,
    RecordingError,
    RecordingExistsError,
    RecordingFormatError,
    RecordingHeader,
    RecordInputError,
    UnsupportedVersionError,
)
from labwatch.recording_reader import (
    TAIL_STATUSES,
    DamagedRegion,
    Recording,
    RecordReader,
    TailReport,
    read_records,
)
from labwatch.recording_writer import DEFAULT_MAX_BUFFER_BYTES, RecordWriter, WriterStats

__all__ = [
    "DEFAULT_MAX_BUFFER_BYTES",
    "DEFAULT_MAX_RECORD_BYTES",
    "FORMAT_VERSION",
    "MAGIC",
    "MAX_METADATA_BYTES",
    "RECORD_KINDS",
    "SYNC_MARKER",
    "TAIL_STATUSES",
    "DamagedRegion",
    "NotARecordingError",
    "Record",
    "RecordInputError",
    "RecordReader",
    "RecordWriter",
    "Recording",
    "RecordingError",
    "RecordingExistsError",
    "RecordingFormatError",
    "RecordingHeader",
    "TailReport",
    "UnsupportedVersionError",
    "WriterStats",
    "read_records",
]
