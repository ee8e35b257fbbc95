"""The journal: an append-only file of events, one self-checking record a line.

Line format (ASCII only)::

    <crc>␠<json>\\n

``<json>`` is the record as one compact JSON object (``ensure_ascii``, no NaN or infinity, so it
never holds a raw newline or a non-ASCII byte). ``<crc>`` is the CRC-32 (zlib's polynomial) of
exactly the ``<json>`` bytes, written as 8 lowercase hexadecimal digits; one space separates the
two. A line is a record only once its newline is written: the newline is the commit mark.

Durability. ``append`` hands the whole line to the kernel with ``os.write`` before it returns
(no user-space buffer), so once ``append`` returns the record survives a kill -9 of the process;
it survives power loss only after ``sync`` (``fdatasync``) when the journal was opened with
``durability="fsync"``. With ``"flush"`` (tests and benchmarks) ``sync`` does nothing.

Reading. A crash can leave the last line torn: cut short (no newline) or, after power loss,
holding bytes that fail the CRC. ``read_journal`` ignores such a final line and reports its
length in ``JournalTail``; ``Journal.open`` truncates the file back to the end of the last good
record before anything is appended, so a torn line never ends up in the middle. A bad line
anywhere but last cannot come from a crash during append and raises ``StateError`` naming the
file, the line and its byte offset. So is a line whose CRC matches but whose JSON is not an
object: the writer wrote it that way, so it is no torn write.

One process writes a journal at a time; the state store's lock sees to that.
"""

from __future__ import annotations

import errno
import json
import os
import zlib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from trimtab.errors import ArgumentError, StateError
from trimtab.logs import get_logger

__all__ = ["Durability", "Journal", "JournalTail", "encode_record", "read_journal"]

Durability = Literal["fsync", "flush"]

FILE_MODE = 0o600
_CRC_DIGITS = 8
# Built once: json.dumps() with options builds a new encoder for every record.
_ENCODER = json.JSONEncoder(ensure_ascii=True, allow_nan=False, separators=(",", ":"))
_log = get_logger(__name__)


@dataclass(frozen=True, slots=True)
class JournalTail:
    """What reading a journal found after its last good record.

    ``good_bytes`` is the length of the file up to and including the last good record's
    newline; ``torn_bytes`` the bytes after it (0 when the file ends cleanly); ``reason`` says
    what was wrong with the torn final line, or is ``None``.
    """

    good_bytes: int
    torn_bytes: int
    reason: str | None = None


def encode_record(record: Mapping[str, Any]) -> bytes:
    """One journal line for ``record``, newline included; ``StateError`` if it is not JSON."""
    if not isinstance(record, Mapping):
        raise StateError(f"journal record must be a mapping, got {type(record).__name__}")
    try:
        payload = _ENCODER.encode(record).encode("ascii")
    except (TypeError, ValueError) as exc:
        raise StateError(f"journal record is not strict JSON: {exc}") from exc
    return b"%08x %s\n" % (zlib.crc32(payload), payload)


def _decode_line(line: bytes) -> tuple[dict[str, Any] | None, str, bool]:
    """Decode one line without its newline: (record, problem, crc_ok)."""
    if len(line) < _CRC_DIGITS + 2 or line[_CRC_DIGITS] != 0x20:
        return None, "not '<crc> <json>'", False
    digits, payload = line[:_CRC_DIGITS], line[_CRC_DIGITS + 1 :]
    try:
        stored = int(digits.decode("ascii"), 16)
    except (UnicodeDecodeError, ValueError):
        return None, f"checksum field {digits!r} is not hexadecimal", False
    computed = zlib.crc32(payload)
    if stored != computed:
        return None, f"checksum mismatch (stored {stored:08x}, computed {computed:08x})", False
    try:
        value = json.loads(payload)
    except ValueError as exc:
        return None, f"checksum matches but the JSON is invalid: {exc}", True
    if not isinstance(value, dict):
        return None, f"checksum matches but the JSON is a {type(value).__name__}", True
    return value, "", True


def scan_journal(data: bytes, path: Path,
                 offsets: list[int] | None = None) -> tuple[list[dict[str, Any]], JournalTail]:
    """Decode journal bytes ``data`` read from ``path`` (named in errors).

    When ``offsets`` is given, the byte offset of each record returned is appended to it.
    """
    records: list[dict[str, Any]] = []
    pos = 0
    line_no = 0
    size = len(data)
    while pos < size:
        line_no += 1
        end = data.find(b"\n", pos)
        if end == -1:
            return records, JournalTail(pos, size - pos, f"line {line_no} has no newline")
        record, problem, crc_ok = _decode_line(data[pos:end])
        if record is None:
            last = end + 1 == size
            if last and not crc_ok:
                return records, JournalTail(pos, size - pos, f"line {line_no}: {problem}")
            where = f"{path}: line {line_no} (byte offset {pos})"
            if last:
                raise StateError(f"journal {where}: {problem}")
            raise StateError(
                f"journal {where}: {problem}; {size - end - 1} more bytes follow, so this is "
                "damage inside the journal, not a write torn by a crash"
            )
        records.append(record)
        if offsets is not None:
            offsets.append(pos)
        pos = end + 1
    return records, JournalTail(pos, 0)


def read_journal(path: Path,
                 offsets: list[int] | None = None) -> tuple[list[dict[str, Any]], JournalTail]:
    """Every good record of the journal at ``path``, and what follows the last of them.

    Never modifies the file. ``StateError`` if it cannot be read or is damaged before its
    final line. ``offsets``, when given, receives each record's byte offset.
    """
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise StateError(f"journal {path}: cannot read: {exc}") from exc
    return scan_journal(data, Path(path), offsets)


def fsync_directory(directory: Path) -> None:
    """Make the directory entries (created, renamed, removed files) in ``directory`` durable."""
    fd = os.open(directory, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _datasync(fd: int) -> None:
    sync = getattr(os, "fdatasync", os.fsync)  # fdatasync is Linux's; it flushes the size too
    sync(fd)


class Journal:
    """An open journal file, appended to one record at a time. Use ``Journal.open``."""

    def __init__(self, path: Path, fd: int, size: int, durability: Durability) -> None:
        self._path = path
        self._fd: int | None = fd
        self._size = size
        self._durability: Durability = durability
        self.torn_bytes = 0
        """Bytes of a torn final line cut off when the journal was opened."""

    @classmethod
    def open(cls, path: Path, durability: Durability) -> Journal:
        """Open ``path`` for appending, creating it (mode 0600) if missing.

        An existing file is checked first: a torn final line is cut off (and logged), damage
        before it raises ``StateError``.
        """
        if durability not in ("fsync", "flush"):
            raise ArgumentError(f"durability must be 'fsync' or 'flush', not {durability!r}")
        path = Path(path)
        flags = os.O_WRONLY | os.O_APPEND | os.O_CLOEXEC
        created = False
        try:
            try:
                fd = os.open(path, flags | os.O_CREAT | os.O_EXCL, FILE_MODE)
                created = True
            except FileExistsError:
                fd = os.open(path, flags)
        except OSError as exc:
            raise StateError(f"journal {path}: cannot open for appending: {exc}") from exc
        try:
            journal = cls(path, fd, 0, durability)
            if created:
                if durability == "fsync":
                    fsync_directory(path.parent)
            else:
                journal._repair_tail()
        except BaseException:
            os.close(fd)
            raise
        return journal

    def _repair_tail(self) -> None:
        _records, tail = read_journal(self._path)
        if tail.torn_bytes:
            try:
                os.ftruncate(self._fd_or_raise(), tail.good_bytes)
                if self._durability == "fsync":
                    _datasync(self._fd_or_raise())
            except OSError as exc:
                raise StateError(f"journal {self._path}: cannot cut torn tail: {exc}") from exc
            _log.warning(
                "journal_tail_truncated",
                path=str(self._path),
                torn_bytes=tail.torn_bytes,
                offset=tail.good_bytes,
                reason=tail.reason,
            )
        self._size = tail.good_bytes
        self.torn_bytes = tail.torn_bytes

    @property
    def path(self) -> Path:
        """The journal file."""
        return self._path

    @property
    def size(self) -> int:
        """Bytes in the file: all of them whole records."""
        return self._size

    @property
    def closed(self) -> bool:
        """True once ``close`` has run."""
        return self._fd is None

    def _fd_or_raise(self) -> int:
        if self._fd is None:
            raise StateError(f"journal {self._path} is closed")
        return self._fd

    def append(self, record: Mapping[str, Any]) -> None:
        """Write ``record`` as one line, handed to the kernel before this returns.

        If the write fails part-way (a full disk) the partial line is cut off again, so the
        file still ends with a whole record, and ``StateError`` is raised.
        """
        self._write(encode_record(record))

    def append_many(self, records: Iterable[Mapping[str, Any]]) -> None:
        """``append`` each record, in order, with one write: a batch costs one system call.

        All or none: if the write fails part-way the file is cut back to where it was.
        """
        lines = b"".join([encode_record(r) for r in records])
        if lines:
            self._write(lines)

    def _write(self, line: bytes) -> None:
        fd = self._fd_or_raise()
        view = memoryview(line)
        try:
            while view:
                written = os.write(fd, view)
                if written <= 0:
                    raise OSError(errno.EIO, "write returned no progress")
                view = view[written:]
        except OSError as exc:
            self._undo_partial_write()
            raise StateError(
                f"journal {self._path}: cannot append at byte offset {self._size}: {exc}"
            ) from exc
        self._size += len(line)

    def _undo_partial_write(self) -> None:
        try:
            os.ftruncate(self._fd_or_raise(), self._size)
        except OSError as exc:  # the next open cuts the torn line instead
            _log.error("journal_truncate_failed", path=str(self._path), error=str(exc))

    def sync(self) -> None:
        """Make every appended record durable (fsync mode); a no-op in flush mode."""
        fd = self._fd_or_raise()
        if self._durability != "fsync":
            return
        try:
            _datasync(fd)
        except OSError as exc:
            raise StateError(f"journal {self._path}: fsync failed: {exc}") from exc

    def close(self) -> None:
        """Close the file. Does not sync; call ``sync`` first where durability matters."""
        if self._fd is not None:
            fd, self._fd = self._fd, None
            os.close(fd)

    def __enter__(self) -> Journal:
        return self

    def __exit__(self, *_exc: object) -> None:
        self.close()
