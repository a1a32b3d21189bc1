"""Writer of labwatch recordings: buffered, append-only, fails cleanly on I/O errors.

Records are buffered in memory (at most ``max_buffer_bytes``) and handed to the OS at most
``flush_interval_s`` after being written, by a flusher thread the writer owns.  There is
no per-record ``fsync``; ``close()`` fsyncs.  An I/O error (disk full, device gone) puts
the writer in a failed state: the failing call raises :class:`RecordingError`, every later
write raises a fresh one at once, and the partly written chunk is cut off again with
``ftruncate`` so the file keeps ending on a record boundary.  Bytes flushed before the
failure are never touched.
"""

from __future__ import annotations

import errno
import os
import stat
import threading
import time
import weakref
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from types import TracebackType
from typing import Any

from labwatch.recording_format import (
    _OVERHEAD,
    _TEXT_ERRORS,
    DEFAULT_MAX_RECORD_BYTES,
    RecordingError,
    RecordingExistsError,
    RecordInputError,
    check_time,
    encode_header,
    encode_record,
)

__all__ = ["DEFAULT_MAX_BUFFER_BYTES", "RecordWriter", "WriterStats"]

#: Default cap on bytes held in memory before the writer flushes synchronously.
DEFAULT_MAX_BUFFER_BYTES = 8 * 1024 * 1024


@dataclass(frozen=True)
class WriterStats:
    """Counters of a :class:`RecordWriter` (a snapshot).

    Attributes
    ----------
    path : str
        File written.
    records_written : int
        Records accepted by ``write``/``annotate``.
    records_flushed : int
        Records handed to the OS.  After a failure, ``records_written - records_flushed``
        records were lost.
    bytes_flushed : int
        Bytes handed to the OS, file header included.
    bytes_buffered : int
        Bytes waiting in memory.
    failed : bool
        True once an I/O error occurred; the writer then refuses every write.
    error : str or None
        Message of that error.
    """

    path: str
    records_written: int
    records_flushed: int
    bytes_flushed: int
    bytes_buffered: int
    failed: bool
    error: str | None


def _open_new(path: str) -> tuple[int, bool]:
    """Open ``path`` for writing: create a new regular file, or open a device/FIFO."""
    try:
        return os.open(
            path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_CLOEXEC", 0), 0o644
        ), True
    except FileExistsError:
        pass
    except OSError as exc:
        raise RecordingError(exc.errno, f"cannot create recording: {exc.strerror}", path) from exc
    try:
        mode = os.stat(path).st_mode
        if stat.S_ISREG(mode) or stat.S_ISDIR(mode):
            raise RecordingExistsError(
                errno.EEXIST,
                "refusing to open an existing file (recordings are never appended to or "
                "overwritten; choose a new file name)",
                path,
            )
        return os.open(path, os.O_WRONLY | getattr(os, "O_CLOEXEC", 0)), False
    except RecordingExistsError:
        raise
    except OSError as exc:
        raise RecordingError(exc.errno, f"cannot open recording: {exc.strerror}", path) from exc


class _Sink:
    """Buffer, file descriptor and flusher thread of a writer (no reference to the writer,
    so an unclosed writer can still be garbage-collected and closed by its finalizer)."""

    def __init__(
        self,
        fd: int,
        path: str,
        regular: bool,
        flushed: int,
        interval: float,
        max_buffer: int,
        fsync_on_flush: bool,
    ) -> None:
        self.fd = fd
        self.path = path
        self.regular = regular
        self.interval = interval
        self.max_buffer = max_buffer
        self.fsync_on_flush = fsync_on_flush
        self.cond = threading.Condition(threading.Lock())  # guards the fields below
        self.io_lock = threading.Lock()  # serialises OS writes, taken before ``cond``
        self.buf = bytearray()
        self.buf_records = 0
        self.pending_since = 0.0
        self.written = 0
        self.flushed_records = 0
        self.flushed_bytes = flushed
        self.error: OSError | None = None
        self.error_reported = False
        self.closing = False
        self.closed = False
        self.thread: threading.Thread | None = None
        if interval > 0:
            self.thread = threading.Thread(
                target=self._run,
                name=f"labwatch-recording-flush:{os.path.basename(path)}",
                daemon=True,
            )
            self.thread.start()

    # -- state

    def failure(self) -> RecordingError:
        """A fresh error describing the stored failure (one traceback per raise)."""
        exc = self.error
        assert exc is not None
        self.error_reported = True
        err = RecordingError(
            exc.errno or errno.EIO,
            f"recording failed ({exc.strerror or exc}); {self.flushed_records} records were "
            "saved, later ones were not and the writer accepts no more",
            self.path,
        )
        err.__cause__ = exc
        return err

    def check(self) -> None:
        if self.error is not None:
            raise self.failure()
        if self.closing:
            raise ValueError(f"RecordWriter for {self.path!r} is closed")

    # -- buffering

    def _store(self, rec: bytes) -> int:
        """Put ``rec`` in the buffer; caller holds ``cond`` and has checked the state."""
        if not self.buf:
            self.pending_since = time.monotonic()
            self.cond.notify()
        self.buf += rec
        self.buf_records += 1
        self.written += 1
        return self.written - 1

    def append(self, rec: bytes) -> int:
        """Buffer (or write through) one encoded record; return its index."""
        with self.cond:
            self.check()
            fits = len(self.buf) + len(rec) <= self.max_buffer
            if fits:
                index = self._store(rec)
                if self.interval > 0:
                    return index
        if fits:  # flush_interval_s == 0: write through
            self.flush(raise_errors=True)
            return index
        # Buffer cap reached: write the buffer and this record now (back-pressure on the
        # caller, bounded memory), in order.
        with self.io_lock:
            with self.cond:
                self.check()
                data, count = self.buf, self.buf_records
                self.buf, self.buf_records = bytearray(), 0
                index = self.written
                self.written += 1
            if data:
                self._write_out(data, count, raise_errors=True)
            self._write_out(rec, 1, raise_errors=True)
        return index

    def flush(self, raise_errors: bool, fsync: bool = False) -> None:
        with self.io_lock:
            with self.cond:
                if self.closing:
                    if raise_errors:
                        self.check()
                    return
                if self.error is not None:
                    if raise_errors:
                        raise self.failure()
                    return
                data, count = self.buf, self.buf_records
                self.buf, self.buf_records = bytearray(), 0
            if data:
                self._write_out(data, count, raise_errors)
            if (fsync or self.fsync_on_flush) and self.error is None:
                self._fsync(raise_errors)

    def _write_out(self, data: bytes | bytearray, count: int, raise_errors: bool) -> None:
        """Write ``data`` (``count`` whole records) to the fd; caller holds ``io_lock``."""
        view = memoryview(data)
        done = 0
        try:
            while done < len(data):
                done += _write_some(self.fd, view[done:])
        except Exception as exc:  # noqa: BLE001 - the writer must never crash its caller
            self._fail(exc)
            if raise_errors:
                with self.cond:
                    raise self.failure() from exc
            return
        finally:
            view.release()
        with self.cond:
            self.flushed_records += count
            self.flushed_bytes += len(data)

    def _fsync(self, raise_errors: bool) -> None:
        if not self.regular:
            return
        try:
            os.fsync(self.fd)
        except Exception as exc:  # noqa: BLE001
            self._fail(exc)
            if raise_errors:
                with self.cond:
                    raise self.failure() from exc

    def _fail(self, exc: BaseException) -> None:
        if not isinstance(exc, OSError):
            exc = OSError(errno.EIO, f"{type(exc).__name__}: {exc}")
        with self.cond:
            if self.error is None:
                self.error = exc
            self.buf, self.buf_records = bytearray(), 0
        if self.regular:
            # Cut off the partial chunk so the file ends on a record boundary again.
            try:
                os.ftruncate(self.fd, self.flushed_bytes)
            except OSError:
                pass

    def _run(self) -> None:
        try:
            while True:
                with self.cond:
                    while not self.buf and not self.closing:
                        self.cond.wait()
                    if self.closing:
                        return
                    deadline = self.pending_since + self.interval
                    while not self.closing:
                        remaining = deadline - time.monotonic()
                        if remaining <= 0:
                            break
                        self.cond.wait(remaining)
                    if self.closing:
                        return
                self.flush(raise_errors=False)
                with self.cond:
                    if self.error is not None:
                        return
        except BaseException as exc:  # noqa: BLE001 - keep failures out of threading.excepthook
            with self.io_lock:
                self._fail(exc)

    # -- shutdown

    def close(self, raise_errors: bool = True) -> None:
        with self.cond:
            if self.closed:
                return
            self.closing = True
            self.cond.notify_all()
        if self.thread is not None and self.thread is not threading.current_thread():
            self.thread.join()
        try:
            with self.io_lock:
                with self.cond:
                    data, count = self.buf, self.buf_records
                    self.buf, self.buf_records = bytearray(), 0
                    failed = self.error is not None
                if data and not failed:
                    self._write_out(data, count, raise_errors=False)
                if self.error is None:
                    self._fsync(raise_errors=False)
        finally:
            with self.cond:
                self.closed = True
            try:
                os.close(self.fd)
            except OSError as exc:
                self._fail(exc)
        with self.cond:
            if raise_errors and self.error is not None and not self.error_reported:
                raise self.failure()

    def close_quietly(self) -> None:
        try:
            self.close(raise_errors=False)
        except Exception:  # noqa: BLE001 - finalizer at exit
            pass


class RecordWriter:
    """Append records to a new recording file.

    Parameters
    ----------
    path : str or os.PathLike
        File to create.  An existing regular file is refused
        (:class:`RecordingExistsError`); an existing device or FIFO is opened for writing.
    metadata : mapping, optional
        Free-form JSON-serialisable metadata stored in the file header (for instance the
        endpoint and the acquisition setup).  ``"software"`` is set to the labwatch
        version unless given.
    flush_interval_s : float
        Buffered records are handed to the OS at most this many seconds after being
        written (by a flusher thread owned by the writer).  ``0`` writes each record
        through at once, without a thread.
    max_buffer_bytes : int
        Cap on buffered bytes; a write that would exceed it first flushes synchronously.
    max_record_bytes : int
        Largest record body accepted; larger messages raise :class:`RecordInputError`.
    fsync_on_flush : bool
        Also ``fsync`` after every timed flush (``close`` always fsyncs).

    Raises
    ------
    RecordingError
        The file cannot be created or its header cannot be written.

    Notes
    -----
    An I/O error during a write or a timed flush puts the writer in a failed state: the
    call that sees it raises :class:`RecordingError` (``errno`` preserved, e.g. ``ENOSPC``)
    and every later write raises a fresh ``RecordingError`` without touching the file.
    Everything flushed before the failure stays intact.  The writer may be called from
    several threads; records from one thread keep their order.

    Examples
    --------
    >>> import os, tempfile, time
    >>> path = os.path.join(tempfile.mkdtemp(), "run.lwrec")
    >>> with RecordWriter(path, metadata={"endpoint": "tcp://127.0.0.1:5599"}) as w:
    ...     w.write([b"counts", b'{"seq": 0}', b"\\x00" * 8],
    ...             received_wall=time.time(), received_mono=time.monotonic())
    ...     w.write([b"junk"], received_wall=time.time(), received_mono=time.monotonic(),
    ...             rejected_reason="expected 3 frames, got 1")
    0
    1
    >>> from labwatch.recording import read_records
    >>> [r.kind for r in read_records(path).records]
    ['accepted', 'rejected']
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        metadata: Mapping[str, Any] | None = None,
        flush_interval_s: float = 0.5,
        *,
        max_buffer_bytes: int = DEFAULT_MAX_BUFFER_BYTES,
        max_record_bytes: int = DEFAULT_MAX_RECORD_BYTES,
        fsync_on_flush: bool = False,
    ) -> None:
        interval = check_time("flush_interval_s", flush_interval_s)
        if interval < 0:
            raise RecordInputError(f"flush_interval_s must be >= 0, got {flush_interval_s!r}")
        for name, value in (
            ("max_buffer_bytes", max_buffer_bytes),
            ("max_record_bytes", max_record_bytes),
        ):
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise RecordInputError(f"{name} must be a positive integer, got {value!r}")
        if max_record_bytes > 0xFFFFFFFF - _OVERHEAD:
            raise RecordInputError(
                f"max_record_bytes must fit the 32-bit length field, got {max_record_bytes}"
            )
        self._path = os.fspath(path)
        self._max_record = max_record_bytes
        header = encode_header(metadata, time.time(), time.monotonic())
        fd, created = _open_new(self._path)
        try:
            regular = stat.S_ISREG(os.fstat(fd).st_mode)
            view = memoryview(header)
            done = 0
            while done < len(header):
                done += _write_some(fd, view[done:])
            if regular:
                os.fsync(fd)
                _fsync_dir(self._path)
        except OSError as exc:
            os.close(fd)
            if created:
                try:
                    os.unlink(self._path)
                except OSError:
                    pass
            raise RecordingError(
                exc.errno, f"cannot write recording header: {exc.strerror}", self._path
            ) from exc
        self._sink = _Sink(
            fd, self._path, regular, len(header), interval, max_buffer_bytes, fsync_on_flush
        )
        self._finalizer = weakref.finalize(self, self._sink.close_quietly)

    # -- writing

    def write(
        self,
        frames: Sequence[Any],
        *,
        received_wall: float,
        received_mono: float,
        rejected_reason: str | None = None,
    ) -> int:
        """Record one received message.

        Parameters
        ----------
        frames : sequence of bytes-like
            The message frames as received (any count, any lengths, empty frames too).
        received_wall, received_mono : float
            Receive time: ``time.time()`` and ``time.monotonic()``, seconds.
        rejected_reason : str, optional
            Why the monitor rejected the message; ``None`` records an accepted message.

        Returns
        -------
        int
            0-based index of the record in the file.

        Raises
        ------
        RecordingError
            An I/O error happened now or earlier (the writer is failed).
        RecordInputError
            Frames are not bytes-like, a time is not finite, or the record is too large.
        """
        sink = self._sink
        if sink.error is not None:
            with sink.cond:
                raise sink.failure()
        if isinstance(frames, (bytes, bytearray, memoryview, str)):
            raise RecordInputError(
                f"frames must be a sequence of byte frames, got a single {type(frames).__name__}"
            )
        if rejected_reason is None:
            kind, text = "accepted", b""
        elif isinstance(rejected_reason, str):
            kind, text = "rejected", rejected_reason.encode("utf-8", _TEXT_ERRORS)
        else:
            raise RecordInputError(
                f"rejected_reason must be a str or None, got {rejected_reason!r}"
            )
        rec = encode_record(
            kind,
            frames,
            check_time("received_wall", received_wall),
            check_time("received_mono", received_mono),
            text,
            self._max_record,
        )
        return self._append(rec)

    def annotate(
        self,
        text: str,
        *,
        received_wall: float | None = None,
        received_mono: float | None = None,
    ) -> int:
        """Record a free-text annotation (e.g. ``"new run started: run 7"``).

        Times default to now (``time.time()``, ``time.monotonic()``).  Returns the record
        index; raises like :meth:`write`.
        """
        if not isinstance(text, str):
            raise RecordInputError(f"annotation text must be a str, got {text!r}")
        wall = time.time() if received_wall is None else received_wall
        mono = time.monotonic() if received_mono is None else received_mono
        rec = encode_record(
            "annotation",
            (),
            check_time("received_wall", wall),
            check_time("received_mono", mono),
            text.encode("utf-8", _TEXT_ERRORS),
            self._max_record,
        )
        return self._append(rec)

    def _append(self, rec: bytes) -> int:
        return self._sink.append(rec)

    def flush(self, fsync: bool = False) -> None:
        """Hand buffered records to the OS now (and ``fsync`` if asked).

        Raises :class:`RecordingError` if the writer is or becomes failed.
        """
        self._sink.flush(raise_errors=True, fsync=fsync)

    def close(self) -> None:
        """Flush, fsync and close.  Idempotent.

        Raises :class:`RecordingError` only for a failure the caller has not been told
        about yet (e.g. the final flush hit a full disk).
        """
        self._finalizer.detach()
        self._sink.close()

    def __enter__(self) -> RecordWriter:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    # -- state

    @property
    def path(self) -> str:
        """File being written."""
        return self._path

    @property
    def failed(self) -> bool:
        """True once an I/O error occurred."""
        return self._sink.error is not None

    @property
    def closed(self) -> bool:
        """True after :meth:`close`."""
        return self._sink.closing

    @property
    def stats(self) -> WriterStats:
        """Snapshot of the writer's counters."""
        sink = self._sink
        with sink.cond:
            return WriterStats(
                path=self._path,
                records_written=sink.written,
                records_flushed=sink.flushed_records,
                bytes_flushed=sink.flushed_bytes,
                bytes_buffered=len(sink.buf),
                failed=sink.error is not None,
                error=None if sink.error is None else str(sink.error),
            )

    def fileno(self) -> int:
        """The underlying file descriptor."""
        return self._sink.fd

    def __repr__(self) -> str:
        s = self.stats
        state = "failed" if s.failed else ("closed" if self.closed else "open")
        return f"RecordWriter({self._path!r}, {state}, records_written={s.records_written})"


def _write_some(fd: int, data: memoryview) -> int:
    """``os.write`` that treats a zero-byte write as an I/O error (it would loop forever)."""
    n = os.write(fd, data)
    if n <= 0:
        raise OSError(errno.EIO, "write() wrote nothing")
    return n


def _fsync_dir(path: str) -> None:
    """Make the new directory entry durable (best effort; not all filesystems allow it)."""
    try:
        dfd = os.open(os.path.dirname(os.path.abspath(path)), os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dfd)
    except OSError:
        pass
    finally:
        os.close(dfd)
