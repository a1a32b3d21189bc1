"""Recording format, writer and reader: round trips, truncation, bit flips, disk full."""

from __future__ import annotations

import errno
import gc
import json
import os
import random
import shutil
import struct
import subprocess
import tempfile
import threading
import time
import zlib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from labwatch.recording import (
    FORMAT_VERSION,
    MAGIC,
    RECORD_KINDS,
    SYNC_MARKER,
    TAIL_STATUSES,
    NotARecordingError,
    RecordingError,
    RecordingExistsError,
    RecordingFormatError,
    RecordInputError,
    RecordReader,
    RecordWriter,
    UnsupportedVersionError,
    read_records,
)

# A message as the tests describe it: (frames, wall, mono, rejected_reason or None), or
# ("annotation", text, wall, mono).


def _write_all(path: Path, items: list[tuple], **kw) -> list[int]:
    indices = []
    with RecordWriter(path, metadata={"endpoint": "tcp://127.0.0.1:5599"}, **kw) as w:
        for item in items:
            if item[0] == "annotation":
                _, text, wall, mono = item
                indices.append(w.annotate(text, received_wall=wall, received_mono=mono))
            else:
                frames, wall, mono, reason = item
                indices.append(
                    w.write(frames, received_wall=wall, received_mono=mono, rejected_reason=reason)
                )
    return indices


def _assert_matches(record, item) -> None:
    if item[0] == "annotation":
        _, text, wall, mono = item
        assert record.kind == "annotation"
        assert record.annotation == text
        assert record.frames == ()
        assert record.rejected_reason is None
    else:
        frames, wall, mono, reason = item
        assert record.kind == ("accepted" if reason is None else "rejected")
        assert record.frames == tuple(bytes(f) for f in frames)
        assert record.rejected_reason == reason
        assert record.annotation is None
    # float64 is stored bit for bit
    assert record.received_wall == wall
    assert record.received_mono == mono


def _small_items() -> list[tuple]:
    """A few records of every kind, with empty frames and an empty frame list."""
    return [
        ("annotation", "new run started: run 3", 1.7e9, 100.0),
        ([b"counts", b'{"seq":0}', b"\x01\x02\x03\x04"], 1.7e9 + 0.1, 100.1, None),
        ([b"counts", b"", b""], 1.7e9 + 0.2, 100.2, None),
        ([b"\xff" * 5], 1.7e9 + 0.3, 100.3, "expected 3 frames, got 1"),
        ([], 1.7e9 + 0.4, 100.4, None),
        ([b"counts", b'{"seq":2}', bytes(range(40))], 1.7e9 + 0.5, 100.5, "seq gap: 1 missing"),
        ("annotation", "", 1.7e9 + 0.6, 100.6),
    ]


# ------------------------------------------------------------------------- round trip

frame = st.one_of(
    st.binary(max_size=64),
    st.just(b""),
    # large frames, generated from a seed (Hypothesis is slow at drawing big binaries)
    st.builds(
        lambda n, seed: random.Random(seed).randbytes(n),
        st.integers(0, 300_000),
        st.integers(0, 2**32),
    ),
)
times = st.floats(allow_nan=False, allow_infinity=False, width=64)
message = st.one_of(
    st.tuples(st.lists(frame, max_size=6), times, times, st.none()),
    st.tuples(st.lists(frame, max_size=6), times, times, st.text(max_size=80)),
    st.tuples(st.just("annotation"), st.text(max_size=200), times, times),
)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    items=st.lists(message, max_size=25),
    interval=st.sampled_from([0.0, 0.5]),
    max_buffer=st.sampled_from([1, 4096, 8 * 1024 * 1024]),
)
def test_round_trip_random_messages(items, interval, max_buffer):
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "r.lwrec"
        indices = _write_all(path, items, flush_interval_s=interval, max_buffer_bytes=max_buffer)
        assert indices == list(range(len(items)))
        rec = read_records(path)
        size = path.stat().st_size
    assert rec.intact
    assert rec.tail.status == "clean" and rec.tail.offset == size and rec.tail.bytes_lost == 0
    assert len(rec.records) == len(items)
    pos = rec.header.size
    for i, (record, item) in enumerate(zip(rec.records, items)):
        assert record.index == i
        assert record.offset == pos
        pos += record.length
        _assert_matches(record, item)
    assert pos == size


def test_header_metadata_and_software_default(tmp_path):
    path = tmp_path / "m.lwrec"
    before = time.time()
    with RecordWriter(path, metadata={"endpoint": "tcp://127.0.0.1:5599", "run": [1, 2]}):
        pass
    h = read_records(path).header
    assert h.version == FORMAT_VERSION
    assert h.metadata == {
        "endpoint": "tcp://127.0.0.1:5599",
        "run": [1, 2],
        "software": "labwatch 0.1.0",
    }
    assert before - 1 <= h.created_wall <= time.time() + 1
    assert path.read_bytes().startswith(MAGIC)
    with RecordWriter(tmp_path / "m2.lwrec", metadata={"software": "acq 2.1"}):
        pass
    assert read_records(tmp_path / "m2.lwrec").header.metadata == {"software": "acq 2.1"}


def test_frames_accept_any_bytes_like(tmp_path):
    path = tmp_path / "b.lwrec"
    import array

    strided = memoryview(b"0123456789")[::3]  # not contiguous
    frames = [bytearray(b"ab"), memoryview(b"cde"), array.array("d", [1.5]), strided, b"f"]
    with RecordWriter(path, flush_interval_s=0) as w:
        w.write(frames, received_wall=1.0, received_mono=2.0)
        w.write((f for f in [b"from", b"a generator"]), received_wall=1.0, received_mono=2.0)
    r1, r2 = read_records(path).records
    assert r1.frames == (b"ab", b"cde", struct.pack("d", 1.5), b"0369", b"f")
    assert r2.frames == (b"from", b"a generator")


def test_empty_recording_reads_clean(tmp_path):
    path = tmp_path / "e.lwrec"
    RecordWriter(path).close()
    rec = read_records(path)
    assert rec.records == () and rec.intact and rec.tail.offset == rec.header.size


# --------------------------------------------------------------------------- bad input


def test_bad_input_is_rejected_and_writer_keeps_working(tmp_path):
    path = tmp_path / "bad.lwrec"
    with RecordWriter(path, max_record_bytes=1000, flush_interval_s=0) as w:
        t = {"received_wall": 1.0, "received_mono": 1.0}
        with pytest.raises(RecordInputError, match="frame 1 is a str"):
            w.write([b"a", "text"], **t)
        with pytest.raises(RecordInputError, match="single bytes"):
            w.write(b"abc", **t)
        with pytest.raises(RecordInputError, match="frame 0 is a int"):
            w.write([5], **t)
        with pytest.raises(RecordInputError, match="received_wall must be finite, got nan"):
            w.write([b""], received_wall=float("nan"), received_mono=1.0)
        with pytest.raises(RecordInputError, match="received_mono must be a number"):
            w.write([b""], received_wall=1.0, received_mono="now")
        with pytest.raises(RecordInputError, match="rejected_reason must be a str"):
            w.write([b""], **t, rejected_reason=3)
        with pytest.raises(RecordInputError, match="exceeds max_record_bytes=1000"):
            w.write([bytes(1000)], **t)
        with pytest.raises(RecordInputError, match="annotation text must be a str"):
            w.annotate(b"bytes")
        assert not w.failed
        assert w.write([b"ok"], **t) == 0
    assert [r.frames for r in read_records(path).records] == [(b"ok",)]
    with pytest.raises(ValueError, match="is closed"):
        w.write([b"late"], **t)
    with pytest.raises(ValueError, match="is closed"):
        w.flush()
    w.close()  # idempotent


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"flush_interval_s": -1}, "flush_interval_s must be >= 0, got -1"),
        ({"flush_interval_s": float("inf")}, "flush_interval_s must be finite"),
        ({"max_buffer_bytes": 0}, "max_buffer_bytes must be a positive integer, got 0"),
        ({"max_record_bytes": 2**33}, "32-bit length field"),
        ({"metadata": {"x": float("nan")}}, "metadata must be JSON-serialisable"),
        ({"metadata": {"x": object()}}, "metadata must be JSON-serialisable"),
    ],
)
def test_bad_writer_arguments(tmp_path, kwargs, match):
    with pytest.raises(RecordInputError, match=match):
        RecordWriter(tmp_path / "x.lwrec", **kwargs)
    assert not (tmp_path / "x.lwrec").exists()


def test_existing_file_is_refused_and_left_alone(tmp_path):
    path = tmp_path / "old.lwrec"
    _write_all(path, _small_items())
    before = path.read_bytes()
    with pytest.raises(RecordingExistsError, match="refusing to open an existing file") as info:
        RecordWriter(path)
    assert isinstance(info.value, FileExistsError) and isinstance(info.value, RecordingError)
    assert info.value.errno == errno.EEXIST
    assert path.read_bytes() == before


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs POSIX FIFOs")
def test_recording_into_a_fifo(tmp_path):
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    copy = tmp_path / "copy.lwrec"

    def drain() -> None:
        with open(fifo, "rb") as src, open(copy, "wb") as dst:
            shutil.copyfileobj(src, dst)

    reader = threading.Thread(target=drain)
    reader.start()
    items = _small_items()
    _write_all(fifo, items, flush_interval_s=0.01)
    reader.join(10)
    rec = read_records(copy)
    assert rec.intact
    for record, item in zip(rec.records, items, strict=True):
        _assert_matches(record, item)


def test_unwritable_location_gives_recording_error(tmp_path):
    with pytest.raises(RecordingError, match="cannot create recording") as info:
        RecordWriter(tmp_path / "no-such-dir" / "x.lwrec")
    assert info.value.errno == errno.ENOENT


# ------------------------------------------------------------------ not a recording


def test_not_a_recording(tmp_path):
    p = tmp_path / "notes.txt"
    p.write_text("coincidence counts, run 4\n")
    with pytest.raises(NotARecordingError, match="starts with b'coincide'"):
        RecordReader(p)
    p.write_bytes(b"")
    with pytest.raises(RecordingFormatError, match="is empty"):
        read_records(p)


def _handmade_header(version: int, flags: int = 0, meta: bytes = b"{}") -> bytes:
    head = struct.pack("<8sHHddI", MAGIC, version, flags, 1.0, 2.0, len(meta)) + meta
    return head + struct.pack("<I", zlib.crc32(head))


def test_wrong_version_flags_and_metadata(tmp_path):
    p = tmp_path / "v.lwrec"
    p.write_bytes(_handmade_header(2))
    with pytest.raises(UnsupportedVersionError, match="format version 2; this reader supports"):
        read_records(p)
    p.write_bytes(_handmade_header(FORMAT_VERSION, flags=4))
    with pytest.raises(UnsupportedVersionError, match="flags 0x0004"):
        read_records(p)
    p.write_bytes(_handmade_header(FORMAT_VERSION, meta=b"[1, 2]"))
    with pytest.raises(RecordingFormatError, match="not a JSON object"):
        read_records(p)
    # a hand-made v1 header is a valid empty recording: the layout is what the docs say
    p.write_bytes(_handmade_header(FORMAT_VERSION))
    assert read_records(p).intact


class _Flipper:
    """Flip single bits of a file in place (rewriting whole files is slow on some disks)."""

    def __init__(self, path: Path) -> None:
        self._fd = os.open(path, os.O_RDWR)

    def __call__(self, bit: int) -> None:
        (value,) = os.pread(self._fd, 1, bit // 8)
        os.pwrite(self._fd, bytes([value ^ (1 << (bit % 8))]), bit // 8)

    def close(self) -> None:
        os.close(self._fd)

    def __enter__(self) -> _Flipper:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def test_every_header_bit_flip_is_a_format_error(tmp_path):
    path = tmp_path / "h.lwrec"
    _write_all(path, _small_items()[:2])
    data = bytearray(path.read_bytes())
    hsize = read_records(path).header.size
    bad = tmp_path / "flip.lwrec"
    bad.write_bytes(data)
    with _Flipper(bad) as flip:
        for bit in range(hsize * 8):
            flip(bit)
            with pytest.raises(RecordingFormatError):
                read_records(bad)
            flip(bit)


# --------------------------------------------------------------------------- truncation


def _check_truncated(path: Path, cut: int, full, hsize: int) -> None:
    if cut < hsize:
        with pytest.raises(RecordingFormatError) as info:
            read_records(path)
        # a prefix of a recording must not be mistaken for a foreign file
        assert not isinstance(info.value, NotARecordingError)
        return
    rec = read_records(path)
    complete = [r for r in full.records if r.offset + r.length <= cut]
    assert rec.records == tuple(complete)
    assert rec.damaged == ()
    end = complete[-1].offset + complete[-1].length if complete else hsize
    assert rec.tail.file_size == cut
    assert rec.tail.offset == end
    assert rec.tail.bytes_lost == cut - end
    assert rec.tail.status == ("clean" if cut == end else "truncated")
    assert rec.tail.status in TAIL_STATUSES


def test_truncation_at_every_byte_offset(tmp_path):
    path = tmp_path / "full.lwrec"
    _write_all(path, _small_items())
    full = read_records(path)
    size = path.stat().st_size
    cut_path = tmp_path / "cut.lwrec"
    shutil.copyfile(path, cut_path)
    for cut in range(size, -1, -1):
        os.truncate(cut_path, cut)
        _check_truncated(cut_path, cut, full, full.header.size)


def test_truncation_at_random_offsets_of_a_bigger_file(tmp_path):
    rng = random.Random(20240611)
    items = []
    for i in range(300):
        n = rng.choice([0, 10, 1000, 70_000])
        frames = [b"counts", json.dumps({"seq": i}).encode(), rng.randbytes(n)]
        items.append((frames, 1.7e9 + i, 50.0 + i, None if i % 7 else f"bad seq {i}"))
    path = tmp_path / "big.lwrec"
    _write_all(path, items)
    full = read_records(path)
    size = path.stat().st_size
    cuts = sorted({rng.randrange(full.header.size, size) for _ in range(150)}, reverse=True)
    cut_path = tmp_path / "cut.lwrec"
    shutil.copyfile(path, cut_path)
    for cut in cuts:
        os.truncate(cut_path, cut)
        _check_truncated(cut_path, cut, full, full.header.size)


# ------------------------------------------------------------------ corruption in place


def test_every_record_bit_flip_loses_exactly_that_record(tmp_path):
    path = tmp_path / "r.lwrec"
    _write_all(path, _small_items())
    full = read_records(path)
    size = path.stat().st_size
    bad = tmp_path / "flip.lwrec"
    shutil.copyfile(path, bad)
    last = full.records[-1]
    flip = _Flipper(bad)
    for bit in range(full.header.size * 8, size * 8):
        byte = bit // 8
        flip(bit)
        rec = read_records(bad)
        hit = next(r for r in full.records if r.offset <= byte < r.offset + r.length)
        expected = tuple(r for r in full.records if r is not hit)
        assert [(r.offset, r.frames, r.kind) for r in rec.records] == [
            (r.offset, r.frames, r.kind) for r in expected
        ]
        if rec.damaged:
            assert [(d.offset, d.length) for d in rec.damaged] == [(hit.offset, hit.length)]
            assert rec.tail.clean
        else:
            # a damaged header of the last record leaves an unrecognisable tail
            assert hit is last
            assert rec.tail.status == "corrupt" and rec.tail.offset == hit.offset
        flip(bit)
    flip.close()
    assert bad.read_bytes() == path.read_bytes()


def test_body_damage_is_reported_with_checksums(tmp_path):
    path = tmp_path / "r.lwrec"
    _write_all(path, _small_items())
    full = read_records(path)
    data = bytearray(path.read_bytes())
    target = full.records[2]
    data[target.offset + 20] ^= 0x10  # inside the body
    path.write_bytes(data)
    rec = read_records(path)
    (d,) = rec.damaged
    assert (d.offset, d.length) == (target.offset, target.length)
    assert "record checksum mismatch" in d.reason
    assert len(rec.records) == len(full.records) - 1
    # indices stay consecutive over the intact records
    assert [r.index for r in rec.records] == list(range(len(rec.records)))


def test_garbage_in_the_middle_is_skipped_by_resync(tmp_path):
    path = tmp_path / "r.lwrec"
    _write_all(path, _small_items())
    full = read_records(path)
    data = path.read_bytes()
    at = full.records[3].offset
    rng = random.Random(7)
    # junk that even contains sync markers not followed by a valid record header
    junk = rng.randbytes(50) + SYNC_MARKER + rng.randbytes(30) + SYNC_MARKER + b"\x00" * 5
    path.write_bytes(data[:at] + junk + data[at:])
    rec = read_records(path)
    assert [r.frames for r in rec.records] == [r.frames for r in full.records]
    (d,) = rec.damaged
    assert (d.offset, d.length) == (at, len(junk))
    assert rec.tail.clean


def test_zero_filled_and_garbage_tails(tmp_path):
    path = tmp_path / "r.lwrec"
    _write_all(path, _small_items())
    full = read_records(path)
    size = path.stat().st_size
    with open(path, "ab") as fh:
        fh.write(b"\x00" * 4096)
    rec = read_records(path)
    assert rec.records == full.records
    assert rec.tail.status == "corrupt" and "zero-filled" in rec.tail.reason
    assert (rec.tail.offset, rec.tail.bytes_lost) == (size, 4096)
    with open(path, "ab") as fh:
        fh.write(b"not a record")
    rec = read_records(path)
    assert rec.tail.status == "corrupt" and "unrecognised" in rec.tail.reason
    assert rec.tail.bytes_lost == 4096 + 12


def test_reader_caps_record_size(tmp_path):
    path = tmp_path / "r.lwrec"
    items = [([b"x" * 10], 1.0, 1.0, None), ([bytes(5000)], 2.0, 2.0, None)]
    items += [([b"y"], 3.0, 3.0, None)]
    _write_all(path, items)
    rec = read_records(path, max_record_bytes=1000)
    assert [r.frames for r in rec.records] == [(b"x" * 10,), (b"y",)]
    (d,) = rec.damaged
    assert "exceeds max_record_bytes" in d.reason


def test_huge_length_in_a_checksummed_header_is_not_allocated(tmp_path):
    path = tmp_path / "r.lwrec"
    _write_all(path, _small_items()[:2])
    # A record header claiming a 4 GiB body, with a matching header CRC, at the end:
    head12 = struct.pack("<4sIB3x", SYNC_MARKER, 0xFFFFFFF0, 1)
    with open(path, "ab") as fh:
        fh.write(head12 + struct.pack("<I", zlib.crc32(head12)) + b"\x00" * 100)
    rec = read_records(path)
    assert len(rec.records) == 2
    assert rec.tail.status == "truncated" and "of 4294967300 bytes present" in rec.tail.reason


def test_reader_iterates_repeatably_and_reports_after_the_end(tmp_path):
    path = tmp_path / "r.lwrec"
    _write_all(path, _small_items())
    with RecordReader(path) as reader:
        assert reader.tail is None
        first = list(reader)
        assert reader.tail is not None and reader.tail.clean
        assert list(reader) == first
    assert [r.kind for r in first] == [
        "annotation",
        "accepted",
        "accepted",
        "rejected",
        "accepted",
        "rejected",
        "annotation",
    ]
    assert set(r.kind for r in first) == set(RECORD_KINDS)
    assert "rejected_reason='expected 3 frames, got 1'" in repr(first[3])
    assert "frame_bytes=[5]" in repr(first[3])


# --------------------------------------------------------------------- writer behaviour


def test_timed_flush_reaches_the_os_without_close(tmp_path):
    path = tmp_path / "t.lwrec"
    w = RecordWriter(path, flush_interval_s=0.05)
    try:
        w.write([b"one"], received_wall=1.0, received_mono=1.0)
        # generous timeout: the flusher is due after 0.05 s, a loaded CI box may lag
        deadline = time.monotonic() + 5.0
        while not read_records(path).records and time.monotonic() < deadline:
            time.sleep(0.01)
        assert [r.frames for r in read_records(path).records] == [(b"one",)]
        assert w.stats.records_flushed == 1 and w.stats.bytes_buffered == 0
    finally:
        w.close()


def test_buffer_is_bounded(tmp_path):
    path = tmp_path / "b.lwrec"
    with RecordWriter(path, flush_interval_s=60, max_buffer_bytes=4096) as w:
        for i in range(200):
            w.write([bytes(500)], received_wall=float(i), received_mono=float(i))
            assert w.stats.bytes_buffered <= 4096
        assert w.stats.records_flushed > 150
        w.flush()
        assert w.stats.records_flushed == 200 == w.stats.records_written
    assert len(read_records(path).records) == 200


def test_unclosed_writer_is_flushed_when_collected(tmp_path):
    path = tmp_path / "gc.lwrec"
    w = RecordWriter(path, flush_interval_s=60)
    w.write([b"kept"], received_wall=1.0, received_mono=1.0)
    thread_names = {t.name for t in threading.enumerate()}
    assert any(n.startswith("labwatch-recording-flush") for n in thread_names)
    del w
    gc.collect()
    assert [r.frames for r in read_records(path).records] == [(b"kept",)]
    assert not any(t.name == "labwatch-recording-flush:gc.lwrec" for t in threading.enumerate())


def test_concurrent_writers_threads_keep_per_thread_order(tmp_path):
    path = tmp_path / "c.lwrec"
    with RecordWriter(path, flush_interval_s=0.01, max_buffer_bytes=2000) as w:

        def produce(tag: bytes) -> None:
            for i in range(500):
                w.write([tag, str(i).encode()], received_wall=1.0, received_mono=1.0)

        threads = [threading.Thread(target=produce, args=(t,)) for t in (b"a", b"b", b"c")]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    rec = read_records(path)
    assert rec.intact and len(rec.records) == 1500
    for tag in (b"a", b"b", b"c"):
        seq = [int(r.frames[1]) for r in rec.records if r.frames[0] == tag]
        assert seq == list(range(500))


# ------------------------------------------------------------------------- disk full


def _msg(i: int) -> list[bytes]:
    return [b"counts", json.dumps({"seq": i}).encode(), bytes([i % 256]) * 700]


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="/dev/full is Linux-only")
def test_dev_full_path_fails_cleanly_at_open():
    with pytest.raises(RecordingError, match="cannot write recording header") as info:
        RecordWriter("/dev/full")
    assert info.value.errno == errno.ENOSPC


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="/dev/full is Linux-only")
@pytest.mark.parametrize("interval", [0.0, 0.02])
def test_enospc_mid_recording_via_dev_full(tmp_path, interval):
    """Swap the writer's descriptor for /dev/full (real ENOSPC from the kernel)."""
    path = tmp_path / "f.lwrec"
    w = RecordWriter(path, flush_interval_s=interval)
    for i in range(10):
        w.write(_msg(i), received_wall=float(i), received_mono=float(i))
    w.flush()
    full_fd = os.open("/dev/full", os.O_WRONLY)
    try:
        os.dup2(full_fd, w.fileno())
    finally:
        os.close(full_fd)
    with pytest.raises(RecordingError) as info:
        # with a flusher thread the failure shows up on a later write
        deadline = time.monotonic() + 5.0
        i = 10
        while time.monotonic() < deadline:
            w.write(_msg(i), received_wall=float(i), received_mono=float(i))
            i += 1
            time.sleep(interval / 4)
    assert info.value.errno == errno.ENOSPC
    assert "10 records were saved" in str(info.value)
    assert w.failed and w.stats.records_flushed == 10
    for _ in range(3):  # still failed, same error, nothing else raised
        with pytest.raises(RecordingError) as again:
            w.write(_msg(0), received_wall=0.0, received_mono=0.0)
        assert again.value.errno == errno.ENOSPC
    with pytest.raises(RecordingError):
        w.annotate("still there?")
    with pytest.raises(RecordingError):
        w.flush()
    w.close()  # the caller already saw the error: close is quiet
    rec = read_records(path)
    assert rec.intact
    assert [r.frames for r in rec.records] == [tuple(_msg(i)) for i in range(10)]


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="/dev/full is Linux-only")
def test_failure_first_seen_at_close_is_raised(tmp_path):
    path = tmp_path / "c.lwrec"
    w = RecordWriter(path, flush_interval_s=60)
    w.write(_msg(1), received_wall=1.0, received_mono=1.0)
    full_fd = os.open("/dev/full", os.O_WRONLY)
    os.dup2(full_fd, w.fileno())
    os.close(full_fd)
    with pytest.raises(RecordingError) as info:
        w.close()
    assert info.value.errno == errno.ENOSPC
    w.close()  # idempotent, quiet
    assert read_records(path).records == ()


@pytest.fixture
def tiny_tmpfs():
    """A 64 KiB tmpfs mounted for this test (needs root and mount permission)."""
    mnt = tempfile.mkdtemp(prefix="lwrec-tmpfs-")
    try:
        proc = subprocess.run(
            ["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", mnt],
            capture_output=True,
            text=True,
            timeout=20,
        )
    except (OSError, subprocess.SubprocessError) as exc:
        os.rmdir(mnt)
        pytest.skip(f"cannot run mount for a tiny tmpfs: {exc}")
    if proc.returncode != 0:
        os.rmdir(mnt)
        pytest.skip(f"mounting a tiny tmpfs is not permitted here: {proc.stderr.strip()}")
    try:
        yield Path(mnt)
    finally:
        subprocess.run(["umount", mnt], capture_output=True, timeout=20)
        os.rmdir(mnt)


@pytest.mark.parametrize("interval", [0.0, 0.02])
def test_real_disk_full_on_tiny_tmpfs(tiny_tmpfs, interval):
    path = tiny_tmpfs / f"full-{interval}.lwrec"
    w = RecordWriter(path, flush_interval_s=interval, max_buffer_bytes=16 * 1024)
    written = 0
    with pytest.raises(RecordingError) as info:
        deadline = time.monotonic() + 10.0
        while time.monotonic() < deadline:
            w.write(_msg(written), received_wall=float(written), received_mono=0.0)
            written += 1
            if interval:
                time.sleep(0.001)
    assert info.value.errno == errno.ENOSPC
    saved = w.stats.records_flushed
    assert 0 < saved <= written
    with pytest.raises(RecordingError):
        w.write(_msg(0), received_wall=0.0, received_mono=0.0)
    w.close()
    rec = read_records(path)
    # the partial chunk was cut off again: the file ends on a record boundary
    assert rec.intact
    assert [r.frames for r in rec.records] == [tuple(_msg(i)) for i in range(saved)]
    assert path.stat().st_size == w.stats.bytes_flushed
