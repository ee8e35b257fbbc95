"""The state store: checkpoints plus journals, so a restarted daemon loses nothing.

Layout of the state directory (mode 0700 when this creates it; files mode 0600)::

    store.lock                    held (flock) by the one StateStore using the directory
    checkpoint-00000006.json      engine state after every event of journals < 6
    checkpoint-00000007.json
    journal-00000006.log          events accepted after checkpoint 6 was taken
    journal-00000007.log          events accepted after checkpoint 7: the one appended to

Generation ``g`` pairs a checkpoint with the journal of what came after it; generation 0 has
no checkpoint (the engine starts empty) and its journal holds everything from the start.

``recover`` loads the newest checkpoint that verifies (see ``trimtab.store.checkpoint``) and returns
it with the records of its journal and of every newer journal, oldest first. When the newest
checkpoint is bad, the previous one is used with its journal *and* the newer ones, so the
result is the same events; the bad file is renamed ``….json.corrupt`` and reported in
``Recovery.skipped``. Recovery refuses (``StateError``) rather than start from a state with a
hole in it: no checkpoint verifies, a journal needed for replay is missing, or a journal that
is not the newest ends in a torn line.

``checkpoint(state)`` first syncs the current journal (so an older generation can still be
replayed in full), writes checkpoint ``g+1``, switches to ``journal-(g+1)``, and deletes the
journals older than the oldest checkpoint kept. A crash between any two of these steps leaves a
store that recovers to the same events.

A ``StateStore`` is used from one thread.
"""

from __future__ import annotations

import fcntl
import os
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from trimtab.errors import ArgumentError, StateError
from trimtab.logs import get_logger
from trimtab.store.checkpoint import CheckpointStore
from trimtab.store.journal import FILE_MODE, Durability, Journal, read_journal

__all__ = ["Recovery", "StateStore", "journal_name"]

DIR_MODE = 0o700
LOCK_NAME = "store.lock"
_JOURNAL = re.compile(r"^journal-(\d{8,})\.log$")
_log = get_logger(__name__)


def journal_name(generation: int) -> str:
    """The file name of the journal that follows checkpoint ``generation``."""
    return f"journal-{generation:08d}.log"


@dataclass(frozen=True, slots=True)
class Recovery:
    """What ``StateStore.recover`` found: a state and the events to feed after it.

    ``state`` is ``None`` when no checkpoint exists (start the engine empty); ``generation`` is
    the checkpoint's generation (0 without one); ``records`` are every journaled event after
    that checkpoint, in order; ``torn_bytes`` is the length of the torn final line cut from
    the newest journal; ``skipped`` has one line per bad checkpoint passed over; ``current``
    is how many of the records, the last ones, come from the journal now appended to.
    """

    state: dict[str, Any] | None
    generation: int
    records: list[dict[str, Any]]
    torn_bytes: int
    skipped: list[str]
    current: int = 0


def _check_shapes(path: Path, records: list[dict[str, Any]], offsets: list[int],
                  validate: Callable[[Mapping[str, Any]], object]) -> None:
    """``validate`` each record; its ``StateError`` gets the file and the record's offset."""
    for index, (record, offset) in enumerate(zip(records, offsets, strict=True)):
        try:
            validate(record)
        except StateError as exc:
            raise StateError(f"journal {path}: record {index + 1} at byte offset {offset}: "
                             f"{exc}") from exc


class StateStore:
    """Durable engine state in one directory: ``recover`` once, then append and checkpoint."""

    def __init__(self, directory: Path, *, durability: Durability = "fsync", keep: int = 2,
                 validate: Callable[[Mapping[str, Any]], object] | None = None) -> None:
        if durability not in ("fsync", "flush"):
            raise ArgumentError(f"durability must be 'fsync' or 'flush', not {durability!r}")
        self._dir = Path(directory)
        self._durability: Durability = durability
        self._checkpoints = CheckpointStore(self._dir, keep=keep)
        self._journal: Journal | None = None
        self._generation = 0
        self._reopen = False
        self._validate = validate
        self._lock_fd: int | None = None
        if not self._dir.exists():
            try:
                self._dir.parent.mkdir(parents=True, exist_ok=True)
                try:
                    self._dir.mkdir(mode=DIR_MODE)
                except FileExistsError:
                    pass
                else:
                    os.chmod(self._dir, DIR_MODE)  # mkdir's mode is filtered by the umask
            except OSError as exc:
                raise StateError(f"state directory {self._dir}: cannot create: {exc.strerror}") \
                    from exc

    @property
    def directory(self) -> Path:
        """The state directory."""
        return self._dir

    @property
    def generation(self) -> int:
        """The generation of the journal being appended to (the next checkpoint's minus one)."""
        return self._generation

    @property
    def journal_size(self) -> int:
        """Bytes in the journal being appended to (0 when none is open)."""
        return 0 if self._journal is None else self._journal.size

    def journal_path(self, generation: int) -> Path:
        """The journal file of ``generation``."""
        return self._dir / journal_name(generation)

    def journal_generations(self) -> list[int]:
        """Generations with a journal file, oldest first."""
        found = (_JOURNAL.match(name) for name in os.listdir(self._dir))
        return sorted(int(m.group(1)) for m in found if m)

    def _lock(self) -> None:
        # Not "lock": trimtab.statelock flocks that file for the whole process, and a second
        # flock on it from this process (another open file description) would be refused.
        path = self._dir / LOCK_NAME
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, FILE_MODE)
        except OSError as exc:
            raise StateError(f"state lock {path}: cannot open: {exc}") from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            os.close(fd)
            raise StateError(
                f"state directory {self._dir} is in use by another process (lock {path}: {exc})"
            ) from exc
        self._lock_fd = fd

    def recover(self) -> Recovery:
        """Lock the directory, load the newest good checkpoint and the events after it.

        Opens the newest journal for appending (cutting a torn final line). Call once, before
        ``append`` or ``checkpoint``.
        """
        if self._lock_fd is not None:
            raise StateError(f"state store {self._dir}: recover() called twice")
        self._lock()
        try:
            return self._recover()
        except BaseException:
            self.close()
            raise

    def _recover(self) -> Recovery:
        loaded = self._checkpoints.load_detailed()
        base = 0 if loaded is None else loaded.generation
        journals = set(self.journal_generations())
        newest = max([base, *self._checkpoints.generations(), *journals])

        records: list[dict[str, Any]] = []
        torn = 0
        current = 0
        for generation in range(base, newest + 1):
            path = self.journal_path(generation)
            if generation not in journals:
                if generation == newest:
                    current = 0
                    continue  # a crash after checkpoint `newest`, before its journal existed
                raise StateError(
                    f"journal {path} is missing but journals up to generation {newest} exist;"
                    f" replaying from {'no checkpoint' if loaded is None else f'checkpoint {base}'}"
                    " would skip its events"
                )
            offsets: list[int] = []
            found, tail = read_journal(path, offsets)
            if self._validate is not None:
                _check_shapes(path, found, offsets, self._validate)
            if tail.torn_bytes and generation != newest:
                raise StateError(
                    f"journal {path}: torn final line at byte offset {tail.good_bytes} "
                    f"({tail.torn_bytes} bytes, {tail.reason}) but newer journals follow, so "
                    "events between them are missing"
                )
            torn = tail.torn_bytes
            records.extend(found)
            current = len(found)

        skipped = [] if loaded is None else list(loaded.skipped)
        if loaded is not None:
            for generation in self._checkpoints.generations():
                if generation > loaded.generation:
                    self._checkpoints.quarantine(generation)
        self._journal = Journal.open(self.journal_path(newest), self._durability)
        self._generation = newest
        self._prune_journals()
        _log.info(
            "state_recovered",
            directory=str(self._dir),
            checkpoint=None if loaded is None else base,
            generation=newest,
            records=len(records),
            torn_bytes=torn,
            skipped=len(skipped),
        )
        return Recovery(
            state=None if loaded is None else loaded.state,
            generation=base,
            records=records,
            torn_bytes=torn,
            skipped=skipped,
            current=current,
        )

    def _active(self, operation: str) -> Journal:
        if self._journal is None and self._reopen:
            # A checkpoint was written but its journal could not be opened (a full disk):
            # open it now; until then nothing is appended anywhere.
            self._journal = Journal.open(self.journal_path(self._generation), self._durability)
            self._reopen = False
        if self._journal is None:
            raise StateError(
                f"state store {self._dir}: {operation}() needs a successful recover() first "
                "(not recovered yet, closed, or a failed checkpoint left no journal open)"
            )
        return self._journal

    def append(self, record: Mapping[str, Any]) -> None:
        """Journal one event; it survives a kill -9 once this returns, power loss after sync."""
        self._active("append").append(record)

    def append_many(self, records: Iterable[Mapping[str, Any]]) -> None:
        """Journal several events in order with one write (see ``Journal.append_many``)."""
        self._active("append").append_many(records)

    def sync(self) -> None:
        """Make every appended event durable (fsync mode) before they are acknowledged."""
        self._active("sync").sync()

    def checkpoint(self, state: Mapping[str, Any]) -> int:
        """Save ``state`` (covering every event appended so far); returns its generation."""
        journal = self._active("checkpoint")
        journal.sync()
        new = self._generation + 1
        self._checkpoints.write(state, new)
        # From here on the old journal must never be appended to: recovery would skip it.
        self._journal = None
        journal.close()
        self._generation = new
        self._reopen = True
        self._active("checkpoint")
        self._prune_journals()
        return new

    def _prune_journals(self) -> None:
        kept = self._checkpoints.generations()
        if not kept:
            return
        for generation in self.journal_generations():
            if generation >= kept[0]:
                break
            try:  # oldest first, so the journals left always form an unbroken run
                os.unlink(self.journal_path(generation))
            except OSError as exc:
                _log.warning(
                    "journal_unlink_failed", path=str(self.journal_path(generation)), error=str(exc)
                )

    def close(self) -> None:
        """Close the journal (without syncing) and release the directory lock."""
        if self._journal is not None:
            self._journal.close()
            self._journal = None
        if self._lock_fd is not None:
            fd, self._lock_fd = self._lock_fd, None
            os.close(fd)  # closing the descriptor releases the flock

    def __enter__(self) -> StateStore:
        return self

    def __exit__(self, *_exc: object) -> None:
        self.close()
