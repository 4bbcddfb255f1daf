"""One tally of events and messages: feeds, ledger rows and rejects rows count alike."""

import numpy as np
import pytest

from turnstamp.core.accounting import ACCEPTED, Counters, FeedResult, MessageRecord


def _result(events=10, tagged=6, filtered=2, reasons=("bad_time", "bad_time")):
    return FeedResult(archive={}, rejected_index=np.arange(len(reasons)),
                      rejected_reason=list(reasons), rejected_detail=[""] * len(reasons),
                      events=events, tagged=tagged, filtered=filtered,
                      first_tt_ns=5, last_tt_ns=9)


def test_a_fed_batch_counts_its_events_and_reasons():
    counters = Counters()
    counters.add_feed(_result())
    assert counters.totals() == {
        "events_received": 10, "events_tagged": 6, "events_filtered": 2,
        "events_rejected": 2, "messages_received": 0, "messages_rejected": 0,
        "duplicate_messages": 0, "missing_messages": 0}
    assert counters.rejected_by_reason == {"bad_time": 2}
    assert counters.reconciles()


def test_ledger_records_count_messages_and_reconcile():
    counters = Counters()
    accepted = MessageRecord.accepted(1, "b", 4, _result(), missing_before=3)
    duplicate = MessageRecord.refused(2, "b", 4, "duplicate_message", 7)
    unreadable = MessageRecord.refused(3, None, None, "malformed_message", 0)
    for record in (accepted, duplicate, unreadable):
        counters.add_message(record)
    assert accepted.outcome == ACCEPTED and accepted.rejected == 2
    assert duplicate.rejected == 7 and duplicate.first_tt_ns is None
    assert counters.messages_received == 3
    assert counters.messages_rejected == 2
    assert counters.duplicate_messages == 1
    assert counters.missing_messages == 3
    assert counters.events_received == 17 and counters.events_rejected == 9
    assert counters.reconciles()


def test_a_record_is_its_ledger_row_and_back():
    record = MessageRecord.accepted(1, "b", 4, _result(), missing_before=1)
    row = record.row()
    assert list(row) == ["received_utc_ns", "source", "sequence", "outcome", "events",
                         "tagged", "filtered", "rejected", "missing_before", "first_tt_ns",
                         "last_tt_ns"]  # the ledger schema's fields, in order
    assert MessageRecord.from_row(row) == record


def test_rejects_rows_count_by_reason_and_gap_notes_count_nothing():
    counters = Counters()
    counters.add_rejects(["bad_time", "bad_time", "malformed_message", "sequence_gap",
                          "duplicate_message"], [1, 1, 0, 0, 7])
    assert counters.rejected_by_reason == {"bad_time": 2, "malformed_message": 1,
                                           "duplicate_message": 7}
    with pytest.raises(ValueError):
        counters.add_rejects(["bad_time"], [])


def test_the_state_holds_everything_and_reads_earlier_pipeline_states():
    counters = Counters(events_received=5, events_tagged=5, messages_received=1,
                        rejected_by_reason={"bad_value": 2})
    state = counters.to_state()
    assert Counters.from_state(state) == counters
    state["rejected_by_reason"]["bad_value"] = 99  # the state is a copy
    assert counters.rejected_by_reason == {"bad_value": 2}
    earlier = {"received": 4, "tagged": 1, "filtered": 1, "rejected": 2,
               "by_reason": {"bad_time": 2}}
    assert Counters.from_state(earlier) == Counters(
        events_received=4, events_tagged=1, events_filtered=1, events_rejected=2,
        rejected_by_reason={"bad_time": 2})
    assert Counters.from_state({"events_received": 3}).rejected_by_reason == {}
