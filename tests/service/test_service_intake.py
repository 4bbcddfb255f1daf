"""Admitting messages: decoding and sequence checks at the edge, counts per source."""

import numpy as np

from turnstamp.config import IntakeConfig
from turnstamp.service.intake import Admission, Admitted, Refused
from turnstamp.wire.encode import encode_message
from turnstamp.wire.sequence import SequenceTracker


def _frames(sequence: int, events: int = 3) -> list[bytes]:
    return encode_message("builder-1", sequence, "UTC", {
        "event_id": np.arange(events, dtype=np.uint64),
        "time_ns": np.full(events, 850_000_000 * 10**9, np.int64)})


def test_a_gap_is_noted_a_repeat_refused_and_sources_counted():
    admission = Admission(IntakeConfig(), SequenceTracker())
    first = admission.admit(_frames(0), 11)
    assert isinstance(first, Admitted) and first.missing == 0 and first.notes == []
    later = admission.admit(_frames(3), 12)
    assert isinstance(later, Admitted) and later.missing == 2
    (note,) = later.notes
    assert note.to_pylist()[0] | {"detail": ""} == {
        "received_utc_ns": 12, "source": "builder-1", "sequence": 3, "event_id": None,
        "time_ns": None, "reason": "sequence_gap", "detail": "", "events": 0,
        "message_bytes": 0}
    again = admission.admit(_frames(3), 13)
    assert isinstance(again, Refused)
    assert again.record.outcome == "duplicate_message" and again.record.rejected == 3
    assert again.row.to_pylist()[0]["events"] == 3
    assert admission.source_status() == {"builder-1": {
        "messages": 3, "events": 9, "last_sequence": 3, "missing": 2, "highest_sequence": 3,
        "committed_through": 0, "missing_ranges": [[1, 2]], "missing_ranges_complete": True}}


def test_an_undecodable_message_is_refused_whole_without_a_source():
    admission = Admission(IntakeConfig(), SequenceTracker())
    refused = admission.admit([b"not json", b"\x00\x01"], 5)
    assert isinstance(refused, Refused)
    assert refused.record.source is None and refused.record.outcome == "malformed_message"
    assert refused.row.to_pylist()[0]["message_bytes"] == 10
    assert admission.source_status() == {}


def test_a_refused_message_counts_what_was_decoded_not_what_its_header_claims():
    import json

    admission = Admission(IntakeConfig(), SequenceTracker())
    header = {"format": "turnstamp.events", "version": 1, "source": "liar", "sequence": 0,
              "time_scale": "UTC", "events": 2**63 - 1}
    refused = admission.admit([json.dumps(header).encode(), _frames(0)[1]], 5)
    assert isinstance(refused, Refused) and refused.record.outcome == "oversized_message"
    assert refused.record.events == 0 and refused.record.rejected == 0
    assert refused.row.to_pylist()[0]["events"] == 0
    header["events"] = 2  # the body has 3 rows: a mismatch, nothing decoded
    refused = admission.admit([json.dumps(header).encode(), _frames(0)[1]], 6)
    assert refused.record.events == 0


def test_bytes_after_the_end_of_stream_marker_refuse_the_message():
    admission = Admission(IntakeConfig(), SequenceTracker())
    header, body = _frames(0)
    refused = admission.admit([header, body + b"\x00" * 8 + b"junk"], 5)
    assert isinstance(refused, Refused) and refused.record.outcome == "malformed_message"
    assert "12 bytes after the Arrow end-of-stream marker" in refused.row.to_pylist()[0]["detail"]


def test_a_spoofed_huge_sequence_neither_counts_missing_nor_blocks_the_source():
    admission = Admission(IntakeConfig(max_sequence_jump=1000), SequenceTracker())
    for number in range(3):
        assert isinstance(admission.admit(_frames(number), 1), Admitted)
    spoof = admission.admit(_frames(2**63 - 1), 2)
    assert isinstance(spoof, Admitted) and spoof.missing == 0
    assert spoof.notes[0].to_pylist()[0]["reason"] == "sequence_restart"
    genuine = [admission.admit(_frames(number), 3) for number in (3, 4, 5)]
    assert all(isinstance(a, Admitted) and a.missing == 0 for a in genuine)
    # a sender restarting from 0 is a new run too
    assert isinstance(admission.admit(_frames(0), 4), Admitted)
    assert admission.source_status()["builder-1"]["restarts"] == 3
