"""Recovery at start: the newest good checkpoint, the journal fed again, the outbox restored.

What the journal holds beyond the checkpoint is fed through the engine again, in order; each
reading's journaled corrected value is the one promised, so that is what goes out again (a
recomputed value that differs, after a settings change, is counted and logged). Values the
outbox mark says the broker had not yet taken are queued to publish. A journal shorter than
the mark saw it is reported with exactly what is missing.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from trimtab.logs import get_logger
from trimtab.service.outbox import Mark, Outbox, stored_output
from trimtab.store.records import record_to_event

if TYPE_CHECKING:
    from trimtab.engine.engine import Engine
    from trimtab.store.statestore import StateStore
    from trimtab.wire.codec import JsonCodec, SenmlCodec

__all__ = ["Recovered", "journal_loss", "recover_state"]

log = get_logger("trimtab.service")


@dataclass(frozen=True, slots=True)
class Recovered:
    """What recovery found."""

    records: int
    """Journal records fed again (every generation since the checkpoint)."""
    current: int
    """Of those, the records of the current journal generation."""
    differs: int
    """Recomputed values that differ from the journaled ones (the journaled ones are kept)."""
    journal_lost: dict[str, int] = field(default_factory=lambda: {"bytes": 0, "records": 0})
    """Bytes and records the journal lost against what the outbox mark saw it hold."""


def recover_state(engine: Engine, store: StateStore, mark: Mark, outbox: Outbox,
                  codec: JsonCodec | SenmlCodec,
                  corrected_topic: Callable[[str], str]) -> Recovered:
    """Load the newest good checkpoint into ``engine``, feed the journal, fill ``outbox``."""
    rec = store.recover()
    lost = journal_loss(mark, store, rec.current, rec.torn_bytes)
    if rec.state is not None:
        engine.load_state(rec.state)
    differs = 0
    for record in rec.records:
        outputs = engine.process(record_to_event(record))
        stored = stored_output(record)
        if stored is not None and outputs and codec.encode_corrected(outputs[0]) != stored:
            # The journaled value is the one promised; it is the one published again.
            differs += 1
    if differs:
        log.warning("recovery_output_differs", values=differs,
                    hint="the settings changed since they were journaled; the journaled "
                    "values are published")
    current = rec.records[len(rec.records) - rec.current:]
    for record in rec.records[:len(rec.records) - rec.current]:
        outbox.remember(record)
    queued = outbox.restore(store.generation, current, (mark.generation, mark.done),
                            corrected_topic)
    log.info("state_recovered", generation=rec.generation, journal_records=len(rec.records),
             torn_bytes=rec.torn_bytes, sensors=len(engine.sensors()), outputs_to_publish=queued)
    return Recovered(len(rec.records), rec.current, differs, lost)


def journal_loss(mark: Mark, store: StateStore, records: int, torn: int) -> dict[str, int]:
    """What is missing when the journal is shorter than the mark saw it (logged), else zeros."""
    none = {"bytes": 0, "records": 0}
    if mark.generation != store.generation:
        return none
    size = store.journal_size
    lost_bytes = max(0, mark.journal_bytes - size)
    lost_records = max(0, mark.journal_records - records)
    if not (lost_bytes or lost_records):
        return none
    log.error("journal_data_lost", path=str(store.journal_path(mark.generation)),
              offset=size, bytes_lost=lost_bytes, records_lost=lost_records,
              torn_bytes_cut=torn,
              hint="the journal ends before what this daemon had written to it (cut or "
              "lost in a power failure); counted from the outbox mark, so at least this "
              "much is gone")
    return {"bytes": lost_bytes, "records": lost_records}
