"""Checkpoints: the engine's whole state, written atomically, kept for a few generations.

File ``checkpoint-<generation:08d>.json`` holds two lines, each a JSON object::

    {"format":"trimtab-checkpoint","version":1,"generation":7,"bytes":5120,"sha256":"9f…"}
    {…the state…}

The first line is the header; ``bytes`` is the length of the second line without its newline
and ``sha256`` its SHA-256 in hex, so a truncated, zero-filled or bit-flipped file is detected,
and ``generation`` must match the file name, so a copied or renamed file is detected too. The
state line keeps the caller's key order (the engine may depend on it) and must be strict JSON
(no NaN or infinity).

Writing: the bytes go to ``.checkpoint-<generation>.tmp`` in the same directory (mode 0600),
which is fsynced, renamed onto the final name, and then the directory is fsynced. A crash at
any step leaves either the old set of checkpoints or the new one, plus at worst a leftover temp
file, which ``load`` ignores and the next ``write`` removes. Then every generation but the
newest ``keep`` is deleted.

Loading takes the newest generation that verifies. Each one skipped is logged and reported;
if checkpoint files exist and none verifies, ``StateError`` lists each file and what is wrong
with it: a damaged store is never mistaken for an empty one.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from trimtab.errors import ArgumentError, StateError
from trimtab.logs import get_logger
from trimtab.store.journal import FILE_MODE, fsync_directory

__all__ = ["CheckpointStore", "LoadedCheckpoint", "checkpoint_name"]

FORMAT = "trimtab-checkpoint"
VERSION = 1
_NAME = re.compile(r"^checkpoint-(\d{8,})\.json$")
_TEMP = re.compile(r"^\.checkpoint-\d{8,}\.tmp$")
_log = get_logger(__name__)


def checkpoint_name(generation: int) -> str:
    """The file name of checkpoint ``generation``."""
    return f"checkpoint-{generation:08d}.json"


@dataclass(frozen=True, slots=True)
class LoadedCheckpoint:
    """The newest checkpoint that verified, and one line per newer one that did not."""

    generation: int
    state: dict[str, Any]
    skipped: tuple[str, ...]


def encode_checkpoint(state: Mapping[str, Any], generation: int) -> bytes:
    """The bytes of checkpoint ``generation`` holding ``state``."""
    if not isinstance(state, Mapping):
        raise StateError(f"checkpoint state must be a mapping, got {type(state).__name__}")
    try:
        body = json.dumps(state, ensure_ascii=True, allow_nan=False, separators=(",", ":"))
    except (TypeError, ValueError) as exc:
        raise StateError(f"checkpoint {generation}: state is not strict JSON: {exc}") from exc
    raw = body.encode("ascii")
    header = {
        "format": FORMAT,
        "version": VERSION,
        "generation": generation,
        "bytes": len(raw),
        "sha256": hashlib.sha256(raw).hexdigest(),
    }
    return json.dumps(header, separators=(",", ":")).encode("ascii") + b"\n" + raw + b"\n"


def decode_checkpoint(data: bytes, generation: int) -> dict[str, Any]:
    """The state in checkpoint bytes ``data``; ``StateError`` saying what is wrong with them."""
    if not data:
        raise StateError("empty file")
    end = data.find(b"\n")
    if end == -1:
        raise StateError(f"no header line ({len(data)} bytes, no newline)")
    try:
        header = json.loads(data[:end])
    except ValueError as exc:
        raise StateError(f"header (line 1) is not JSON: {exc}") from None
    if not isinstance(header, dict) or header.get("format") != FORMAT:
        raise StateError(f"line 1 is not a {FORMAT} header")
    if header.get("version") != VERSION:
        raise StateError(f"unsupported version {header.get('version')!r} (reads {VERSION})")
    if header.get("generation") != generation:
        raise StateError(
            f"header says generation {header.get('generation')!r}, file name says {generation}"
        )
    expected = header.get("bytes")
    digest = header.get("sha256")
    if not isinstance(expected, int) or not isinstance(digest, str):
        raise StateError("header lacks 'bytes' or 'sha256'")
    body = data[end + 1 :]
    if len(body) != expected + 1 or not body.endswith(b"\n"):
        raise StateError(
            f"state (line 2, byte offset {end + 1}) is {max(len(body) - 1, 0)} bytes, "
            f"header says {expected}: truncated or extended"
        )
    body = body[:-1]
    actual = hashlib.sha256(body).hexdigest()
    if actual != digest:
        raise StateError(f"sha256 mismatch: header {digest[:16]}…, content {actual[:16]}…")
    try:
        state = json.loads(body)
    except ValueError as exc:
        raise StateError(f"state (line 2) is not JSON: {exc}") from None
    if not isinstance(state, dict):
        raise StateError(f"state (line 2) is a {type(state).__name__}, not an object")
    return state


class CheckpointStore:
    """Generational checkpoints in one directory, owned by one process at a time."""

    def __init__(self, directory: Path, keep: int = 2) -> None:
        if keep < 1:
            raise ArgumentError(f"keep must be at least 1, not {keep}")
        self._dir = Path(directory)
        self._keep = keep

    @property
    def directory(self) -> Path:
        """Where the checkpoint files live."""
        return self._dir

    @property
    def keep(self) -> int:
        """How many generations ``write`` keeps."""
        return self._keep

    def path(self, generation: int) -> Path:
        """The file of checkpoint ``generation``."""
        return self._dir / checkpoint_name(generation)

    def generations(self) -> list[int]:
        """Generations with a checkpoint file, oldest first (whether or not they verify)."""
        try:
            names = os.listdir(self._dir)
        except FileNotFoundError:
            return []
        except OSError as exc:
            raise StateError(f"checkpoint directory {self._dir}: cannot list: {exc}") from exc
        found = (_NAME.match(name) for name in names)
        return sorted(int(m.group(1)) for m in found if m)

    def write(self, state: Mapping[str, Any], generation: int) -> Path:
        """Write ``state`` atomically as checkpoint ``generation``; prune old generations.

        ``generation`` must be newer than every existing one. Returns the file written.
        """
        if generation < 0:
            raise ArgumentError(f"generation must be >= 0, not {generation}")
        existing = self.generations()
        if existing and generation <= existing[-1]:
            raise StateError(
                f"checkpoint generation {generation} is not newer than {self.path(existing[-1])}"
            )
        data = encode_checkpoint(state, generation)
        self._remove_temp_files()
        temp = self._dir / f".checkpoint-{generation:08d}.tmp"
        final = self.path(generation)
        try:
            fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_CLOEXEC, FILE_MODE)
            try:
                view = memoryview(data)
                while view:
                    view = view[os.write(fd, view) :]
                os.fsync(fd)
            finally:
                os.close(fd)
            os.replace(temp, final)
            fsync_directory(self._dir)
        except OSError as exc:
            self._unlink_quietly(temp)
            raise StateError(f"checkpoint {final}: cannot write: {exc}") from exc
        _log.debug("checkpoint_written", path=str(final), bytes=len(data))
        self._prune([*existing, generation])
        return final

    def _prune(self, generations: list[int]) -> None:
        old = sorted(generations)[: -self._keep]
        for generation in old:  # oldest first, so what remains is always the newest run
            self._unlink_quietly(self.path(generation))
        if old:
            fsync_directory(self._dir)

    def _remove_temp_files(self) -> None:
        for name in os.listdir(self._dir):
            if _TEMP.match(name):
                self._unlink_quietly(self._dir / name)

    def _unlink_quietly(self, path: Path) -> None:
        try:
            os.unlink(path)
        except FileNotFoundError:
            pass
        except OSError as exc:  # a leftover file is harmless; say so and go on
            _log.warning("checkpoint_unlink_failed", path=str(path), error=str(exc))

    def read(self, generation: int) -> dict[str, Any]:
        """The state of checkpoint ``generation``; ``StateError`` saying why if it is bad."""
        path = self.path(generation)
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise StateError(f"checkpoint {path}: cannot read: {exc}") from exc
        try:
            return decode_checkpoint(data, generation)
        except StateError as exc:
            raise StateError(f"checkpoint {path}: {exc}") from None

    def load_detailed(self) -> LoadedCheckpoint | None:
        """The newest checkpoint that verifies, with the reasons newer ones were skipped.

        ``None`` only when there is no checkpoint file at all; ``StateError`` listing every
        file and its fault when there are some and none verifies.
        """
        generations = self.generations()
        skipped: list[str] = []
        for generation in reversed(generations):
            try:
                state = self.read(generation)
            except StateError as exc:
                skipped.append(str(exc))
                _log.error("checkpoint_skipped", generation=generation, reason=str(exc))
                continue
            return LoadedCheckpoint(generation, state, tuple(skipped))
        if skipped:
            raise StateError(
                f"no valid checkpoint in {self._dir}; refusing to start from empty state. "
                "Checked, newest first:\n  " + "\n  ".join(skipped)
            )
        return None

    def load(self) -> tuple[int, dict[str, Any]] | None:
        """(generation, state) of the newest checkpoint that verifies, or ``None`` if none exist."""
        loaded = self.load_detailed()
        return None if loaded is None else (loaded.generation, loaded.state)

    def quarantine(self, generation: int) -> Path:
        """Rename a bad checkpoint to ``….json.corrupt``: kept for people, ignored by ``load``."""
        source = self.path(generation)
        target = source.with_name(source.name + ".corrupt")
        try:
            os.replace(source, target)
            fsync_directory(self._dir)
        except OSError as exc:
            raise StateError(f"checkpoint {source}: cannot rename aside: {exc}") from exc
        _log.warning("checkpoint_quarantined", path=str(target))
        return target
