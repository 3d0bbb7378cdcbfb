"""The run journal: an append-only file of checksummed records, fsync'd one by one.

It is the durable record of a run (power-cut experiments: HDF5 alone did not survive cuts
reliably; an append-only journal did every time). A record that is torn (a cut during
the write) or damaged (a flipped byte) fails its checksum and is skipped, never loaded;
reading resynchronises on the next record marker, so damage in the middle loses only the
damaged record, and a torn tail is cut off when the run resumes.

Layout (all integers little-endian)::

    file   = FILE_MAGIC record*
    record = RECORD_MAGIC (4 bytes) | payload length (u64) | CRC-32 of payload (u32)
             | CRC-32 of the 16 bytes before it (u32) | payload
    payload = JSON length (u32) | JSON text (UTF-8) | blob bytes (raw arrays, if any)

The header CRC guards the length field, so a flipped length never swallows good records.
"""

from __future__ import annotations

import contextlib
import json
import mmap
import os
import struct
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

FILE_MAGIC = b"BENCHSEQ-JOURNAL 1\n"
RECORD_MAGIC = b"\xb5JR\x01"
_HEAD = struct.Struct("<4sQII")  # magic, payload length, payload crc, head crc
_JSON_LEN = struct.Struct("<I")
HEAD_SIZE = _HEAD.size
MAX_RECORD_BYTES = 1 << 40  # a sanity bound on a declared length (1 TiB)

try:  # macOS: fsync does not reach the platter; F_FULLFSYNC does
    import fcntl

    _FULLFSYNC: int | None = getattr(fcntl, "F_FULLFSYNC", None)
except ImportError:  # pragma: no cover - Windows
    _FULLFSYNC = None


@dataclass(frozen=True)
class Record:
    """One valid record: its JSON body and where it and its blob sit in the file.

    Blobs (raw arrays) are not held in memory; ``read_blob`` fetches one when needed.
    """

    body: dict[str, Any]
    start: int  # byte offset of the record marker
    end: int  # byte offset just past the record
    blob_start: int
    blob_length: int


@dataclass
class ScanResult:
    """What reading a journal found: valid records, damaged byte ranges and the tail."""

    records: list[Record] = field(default_factory=list)
    damaged: list[tuple[int, int]] = field(default_factory=list)  # (start, end) byte ranges
    valid_end: int = len(FILE_MAGIC)  # end of the last valid record
    size: int = 0  # file size when read
    has_file_magic: bool = True

    @property
    def torn_tail(self) -> bool:
        """True when bytes after the last valid record do not form a record."""
        return self.size > self.valid_end


def encode_record(body: dict[str, Any], blob: bytes = b"") -> bytes:
    """The bytes of one record for ``body`` (JSON-able; NaN allowed) and an optional blob."""
    text = json.dumps(body, separators=(",", ":"), allow_nan=True).encode("utf-8")
    payload = _JSON_LEN.pack(len(text)) + text + blob
    head16 = struct.pack("<4sQI", RECORD_MAGIC, len(payload), zlib.crc32(payload))
    return head16 + struct.pack("<I", zlib.crc32(head16)) + payload


def _decode_payload(payload: memoryview) -> tuple[dict[str, Any], int]:
    """(JSON body, offset of the blob inside the payload)."""
    (json_len,) = _JSON_LEN.unpack_from(payload, 0)
    if json_len > len(payload) - _JSON_LEN.size:
        raise ValueError("JSON length beyond the payload")
    text = bytes(payload[_JSON_LEN.size : _JSON_LEN.size + json_len])
    body = json.loads(text.decode("utf-8"))
    if not isinstance(body, dict):
        raise ValueError("record body is not a JSON object")
    return body, _JSON_LEN.size + json_len


def _record_at(data: bytes | mmap.mmap, pos: int, size: int) -> Record | None:
    """The valid record starting at ``pos``, or None."""
    if pos + HEAD_SIZE > size:
        return None
    magic, length, payload_crc, head_crc = _HEAD.unpack_from(data, pos)
    if magic != RECORD_MAGIC or zlib.crc32(data[pos : pos + 16]) != head_crc:
        return None
    end = pos + HEAD_SIZE + length
    if length > MAX_RECORD_BYTES or end > size:
        return None
    view = memoryview(data)[pos + HEAD_SIZE : end]
    try:
        if zlib.crc32(view) != payload_crc:
            return None
        body, blob_offset = _decode_payload(view)
    except (ValueError, UnicodeDecodeError, struct.error):
        return None
    finally:
        view.release()
    blob_start = pos + HEAD_SIZE + blob_offset
    return Record(body, pos, end, blob_start, end - blob_start)


def scan(path: str | Path, start: int | None = None) -> ScanResult:
    """Read every valid record from ``start`` (default: after the file marker).

    Damaged ranges are skipped by searching for the next record marker whose header and
    payload checksums hold. A missing file raises FileNotFoundError.
    """
    result = ScanResult()
    with open(path, "rb") as handle:
        size = os.fstat(handle.fileno()).st_size
        result.size = size
        if size == 0:
            result.has_file_magic = False
            result.valid_end = 0
            return result
        with mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ) as data:
            result.has_file_magic = data[: len(FILE_MAGIC)] == FILE_MAGIC
            pos = len(FILE_MAGIC) if start is None else start
            result.valid_end = min(pos, size)
            while pos < size:
                record = _record_at(data, pos, size)
                if record is not None:
                    result.records.append(record)
                    result.valid_end = pos = record.end
                    continue
                bad_start = pos
                pos = data.find(RECORD_MAGIC, pos + 1)
                while pos != -1 and _record_at(data, pos, size) is None:
                    pos = data.find(RECORD_MAGIC, pos + 1)
                if pos == -1:
                    result.damaged.append((bad_start, size))
                    break
                result.damaged.append((bad_start, pos))
    return result


def read_blob(handle: BinaryIO, record: Record) -> bytes:
    """The blob bytes of ``record`` from an open journal file (checked by the scan's CRC)."""
    handle.seek(record.blob_start)
    data = handle.read(record.blob_length)
    if len(data) != record.blob_length:
        raise OSError(f"journal shorter than when it was read ({handle.name})")
    return data


def fsync_directory(directory: str | Path) -> None:
    """Make a created, renamed or removed directory entry durable (no-op where unsupported)."""
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:
        return  # e.g. Windows: directories cannot be opened; NTFS journals metadata itself
    try:
        os.fsync(fd)
    except OSError:
        pass  # some network file systems refuse fsync on a directory
    finally:
        os.close(fd)


def fsync_fd(fd: int) -> None:
    """Flush a file to stable storage (F_FULLFSYNC on macOS, where fsync alone does not)."""
    if _FULLFSYNC is not None:
        try:
            fcntl.fcntl(fd, _FULLFSYNC)
            return
        except OSError:
            pass
    os.fsync(fd)


class JournalWriter:
    """Appends records to one journal file; each append is on stable storage when it returns."""

    def __init__(self, path: Path, fd: int, size: int) -> None:
        self.path = path
        self._fd = fd
        self.size = size

    @classmethod
    def create(cls, path: Path, *, replace: bool = False) -> JournalWriter:
        """A new journal holding only the file marker; the directory entry is fsync'd too."""
        flags = os.O_WRONLY | os.O_CREAT | (os.O_TRUNC if replace else os.O_EXCL)
        fd = os.open(path, flags | getattr(os, "O_BINARY", 0), 0o644)
        try:
            _write_all(fd, FILE_MAGIC)
            fsync_fd(fd)
        except OSError:
            os.close(fd)
            with contextlib.suppress(OSError):
                os.unlink(path)
            raise
        fsync_directory(path.parent)
        return cls(path, fd, len(FILE_MAGIC))

    @classmethod
    def reopen(cls, path: Path, valid_end: int) -> JournalWriter:
        """Open an existing journal for appending, cutting anything after ``valid_end``."""
        fd = os.open(path, os.O_RDWR | getattr(os, "O_BINARY", 0))
        try:
            if os.fstat(fd).st_size != valid_end:
                os.ftruncate(fd, valid_end)
                fsync_fd(fd)
        except OSError:
            os.close(fd)
            raise
        return cls(path, fd, valid_end)

    def append(self, body: dict[str, Any], blob: bytes = b"") -> tuple[int, int]:
        """Write one record and fsync; returns its (start, end) offsets.

        On a failed write (disk full, I/O error) the partial record is cut off again where
        possible, so the journal ends at the last good record, and the OSError propagates.
        """
        data = encode_record(body, blob)
        start = self.size
        try:
            os.lseek(self._fd, start, os.SEEK_SET)
            _write_all(self._fd, data)
            fsync_fd(self._fd)
        except OSError:
            with contextlib.suppress(OSError):
                os.ftruncate(self._fd, start)
                fsync_fd(self._fd)
            raise
        self.size = start + len(data)
        return start, self.size

    def close(self) -> None:
        if self._fd >= 0:
            os.close(self._fd)
            self._fd = -1


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        if written <= 0:  # pragma: no cover - os.write raises rather than returning 0
            raise OSError("write returned no progress")
        view = view[written:]


def first_record(path: str | Path) -> Record | None:
    """The first record of a journal if it is valid (the run's header), else None."""
    with open(path, "rb") as handle:
        size = os.fstat(handle.fileno()).st_size
        if size <= len(FILE_MAGIC):
            return None
        with mmap.mmap(handle.fileno(), 0, access=mmap.ACCESS_READ) as data:
            if data[: len(FILE_MAGIC)] != FILE_MAGIC:
                return None
            return _record_at(data, len(FILE_MAGIC), size)


def unreadable_records(path: str | Path, ranges: list[tuple[int, int]]) -> int:
    """How many records the damaged byte ``ranges`` of a journal held (markers found in
    them, at least one per range)."""
    count = 0
    with open(path, "rb") as handle:
        for start, end in ranges:
            handle.seek(start)
            count += max(1, handle.read(end - start).count(RECORD_MAGIC))
    return count
