"""The per-message commit: archive rows, rejects rows, then exactly one ledger row."""

import pyarrow as pa

from turnstamp.core.accounting import ACCEPTED, MessageRecord
from turnstamp.files import schemas
from turnstamp.files.ledger import Ledger
from turnstamp.files.outputs import message_reject_table, rows_table


class Recorder:
    """A stream that notes what was written to it, in one shared log."""

    def __init__(self, name: str, log: list):
        self.name, self.log = name, log

    def write(self, table: pa.Table) -> None:
        self.log.append((self.name, table))


def _event_rejects(reason: str, n: int) -> pa.Table:
    return rows_table([{"received_utc_ns": 1, "source": "b", "sequence": 7, "event_id": i,
                        "time_ns": 0, "reason": reason, "detail": "", "events": 1,
                        "message_bytes": 100} for i in range(n)], schemas.REJECTS)


def test_commit_writes_archive_then_rejects_then_one_ledger_row():
    log = []
    ledger = Ledger(Recorder("archive", log), Recorder("rejects", log), Recorder("ledger", log))
    record = MessageRecord(1, "b", 7, ACCEPTED, events=10, tagged=6, filtered=2, rejected=2,
                           missing_before=3, first_tt_ns=5, last_tt_ns=9)
    gap = message_reject_table(1, "b", 7, "sequence_gap", "3 missing before 7", 0, 0)
    archive = [pa.table({"target": ["one"]}), pa.table({"target": ["two"]})]
    ledger.commit(record, archive, [gap, _event_rejects("bad_time", 2)])
    assert [name for name, _ in log] == ["archive", "archive", "rejects", "rejects", "ledger"]
    row = log[-1][1]
    assert row.schema.equals(schemas.LEDGER) and row.to_pylist() == [record.row()]
    counters = ledger.counters
    assert counters.rejected_by_reason == {"bad_time": 2}  # a gap note counts nothing
    assert (counters.messages_received, counters.missing_messages) == (1, 3)
    assert counters.events_received == 10 and counters.reconciles()


def test_a_refused_message_is_one_rejects_row_then_its_ledger_row():
    log = []
    ledger = Ledger(Recorder("archive", log), Recorder("rejects", log), Recorder("ledger", log))
    record = MessageRecord.refused(1, None, None, "malformed_message", 0)
    ledger.commit(record, rejects=[message_reject_table(1, None, None, "malformed_message",
                                                        "not JSON", 0, 10)])
    assert [name for name, _ in log] == ["rejects", "ledger"]
    assert ledger.counters.rejected_by_reason == {"malformed_message": 1}
    assert ledger.counters.messages_rejected == 1


def test_without_a_ledger_stream_archive_and_rejects_still_go_in_order():
    # offline tagging: the output file is the unit of commit, no ledger stream
    log = []
    ledger = Ledger(Recorder("archive", log), Recorder("rejects", log))
    record = MessageRecord(0, "events.arrow", 0, ACCEPTED, events=3, tagged=2, rejected=1)
    ledger.commit(record, [pa.table({"target": ["one"]})], [_event_rejects("bad_value", 1)])
    assert [name for name, _ in log] == ["archive", "rejects"]
    assert ledger.counters.events_tagged == 2
    assert ledger.counters.rejected_by_reason == {"bad_value": 1}
