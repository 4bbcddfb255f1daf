"""The per-message commit: archive rows, rejects rows, then exactly one ledger row.

Theory of operation
-------------------
The ledger row is the commit mark of a message. Its rows go out in one fixed order:

1. its archive rows (one table per target),
2. its rejects rows (a sequence-gap note, refused events, or the refused message),
3. one ledger row (``MessageRecord.row()``), which carries the message's accounting.

Messages fed together (queued at once) commit together, step by step: all their
archive rows, all their rejects rows, then their ledger rows in one table.

A crash between two steps leaves archive or rejects rows whose message has no
ledger row; ``recovery`` finds them by their (source, sequence) and drops them, so
a message counts either whole or not at all. Change the order and restarts will
double-count or lose. ``Ledger.commit`` is the one place that writes in this
order (the service, and offline tagging, which may go without a ledger stream);
``count_rejects`` and ``message_keys`` are how both the commit and the replay
after a crash read those rows back, so that the two count alike.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Protocol

import pyarrow as pa

from ..core.accounting import Counters, MessageRecord
from .outputs import ledger_table

__all__ = ["TableWriter", "Ledger", "count_rejects", "message_keys"]


class TableWriter(Protocol):
    """Anything that appends Arrow tables to a stream (``RotatingArrowWriter``)."""

    def write(self, table: pa.Table) -> None: ...


class Ledger:
    """Commits messages to the archive, rejects and ledger streams, and counts them.

    Parameters
    ----------
    archive, rejects : TableWriter
        Streams of the archive and rejects schemas.
    ledger : TableWriter, optional
        Stream of the ledger schema; None writes no ledger row (offline tagging,
        where the file is the unit of commit).
    counters : Counters, optional
        Tally to count each committed message into (a fresh one by default).
    """

    def __init__(self, archive: TableWriter, rejects: TableWriter,
                 ledger: TableWriter | None = None, counters: Counters | None = None):
        self.archive = archive
        self.rejects = rejects
        self.ledger = ledger
        self.counters = counters if counters is not None else Counters()
        self.in_commit = False
        """True while a message's rows are being written (its ledger row not yet out)."""

    def commit(self, record: MessageRecord, archive: Iterable[pa.Table] = (),
               rejects: Iterable[pa.Table] = ()) -> None:
        """Write one message's rows in commit order; count it once its ledger row
        is out."""
        self.commit_many([record], archive, rejects)

    def commit_many(self, records: list[MessageRecord], archive: Iterable[pa.Table] = (),
                    rejects: Iterable[pa.Table] = ()) -> None:
        """``commit`` of messages fed together: all their archive rows, all their
        rejects rows, then their ledger rows in one table (a crash before that table
        is whole commits none of them)."""
        rejects = list(rejects)
        self.in_commit = True
        for stream in (self.archive, self.rejects, self.ledger):
            rotate = getattr(stream, "check_rotation", None)
            if rotate is not None:  # between commits: one message's rows never straddle
                rotate()
        for table in archive:
            self.archive.write(table)
        for table in rejects:
            self.rejects.write(table)
        if self.ledger is not None:
            self.ledger.write(ledger_table([record.row() for record in records]))
        self.in_commit = False
        for table in rejects:
            count_rejects(self.counters, table)
        for record in records:
            self.counters.add_message(record)


def count_rejects(counters: Counters, rows: pa.Table | pa.RecordBatch) -> None:
    """Count rejects rows by reason (``Counters.add_rejects``)."""
    counters.add_rejects(rows.column("reason").to_pylist(), rows.column("events").to_pylist())


def message_keys(rows: pa.Table | pa.RecordBatch) -> set[tuple[str | None, int | None]]:
    """The messages, as (source, sequence), that rows of any stream belong to."""
    sources = rows.column("source").to_pylist()
    sequences = rows.column("sequence").to_pylist()
    return set(zip(sources, sequences, strict=True))
