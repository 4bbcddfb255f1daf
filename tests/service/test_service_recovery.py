"""A crash: every count, reasons included, comes back from the checkpoint and the files;
only the message in flight is lost."""

import numpy as np
from running import leave_as_killed

from turnstamp.config import load_config
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.files.outputs import archive_tables, message_reject_table
from turnstamp.files.reader import read_stream
from turnstamp.service.checkpoint import read_checkpoint
from turnstamp.service.loop import Service
from turnstamp.wire.encode import encode_message

RECEIVED = 1_796_180_400.0  # 2026-12-02T03:00:00 UTC, in the demo night: s since 1970


def _night(demo_env, lantern, night_start_tt):
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=16, pulsed_rate_hz=100,
                     background_rate_hz=900, template=lantern.template, batch_seconds=2.0,
                     seed=3, source="kestrel-test")
    batches = list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))
    for bad in (batches[2], batches[6]):
        bad.time_ns[:5] = np.iinfo(np.int64).min  # null times: bad_time
    return batches


def _frames(batch):
    return encode_message(batch.source, batch.sequence, "UTC", batch.columns())


def _crash_with_a_message_in_flight(service: Service, batch) -> None:
    """Its archive and rejects rows are out, its ledger row is not; then every file
    is left as a killed process leaves it: no end written, locks released."""
    result = service.pipeline.feed(batch)
    for table in archive_tables([batch], [result], service.pipeline.targets):
        service.writers["archive"].write(table)
    service.writers["rejects"].write(message_reject_table(
        0, batch.source, batch.sequence, "bad_value", "in flight", len(batch), 0))
    leave_as_killed(service)


def test_a_crash_loses_only_the_message_in_flight(tmp_path, service_config, demo_env, lantern,
                                                  night_start_tt):
    config = load_config(service_config())
    out = tmp_path / "out"
    batches = _night(demo_env, lantern, night_start_tt)
    live = Service(config)
    for batch in batches[:4]:
        live.handle(_frames(batch), RECEIVED)
    live.checkpoint()
    saved = read_checkpoint(out)
    assert saved["counters"]["rejected_by_reason"] == {"bad_time": 5}
    live.handle([b"not json", b"\x00\x01"], RECEIVED)  # after the checkpoint: replayed
    live.handle(_frames(batches[1]), RECEIVED)  # a duplicate
    live.handle(_frames(batches[6]), RECEIVED)  # two missing before it, five bad times
    committed = live.counters.to_state()
    highest = live.admission.tracker.highest()
    _crash_with_a_message_in_flight(live, batches[7])

    resumed = Service(config)
    try:
        assert resumed.counters.to_state() == committed
        assert resumed.counters.rejected_by_reason == {
            "bad_time": 10, "malformed_message": 1, "duplicate_message": len(batches[1])}
        assert resumed.counters.missing_messages == 2 and resumed.counters.reconciles()
        assert resumed.admission.tracker.highest() == highest
        assert any("in flight" in note for note in resumed.notes)
    finally:
        for writer in resumed.writers.values():
            writer.close()
    archive = read_stream(out, "archive")
    assert archive.num_rows == committed["events_tagged"]
    assert 7 not in set(archive["sequence"].to_pylist())
    rejects = read_stream(out, "rejects")
    assert "bad_value" not in set(rejects["reason"].to_pylist())


def test_a_refused_repeat_in_flight_is_not_taken_for_the_message_it_repeats(
        tmp_path, service_config, demo_env, lantern, night_start_tt):
    # message 2 had five bad times (its own rejects rows); its repeat, refused as a
    # duplicate with the same (source, sequence), dies with only its rejects row out
    config = load_config(service_config())
    out = tmp_path / "out"
    batches = _night(demo_env, lantern, night_start_tt)
    live = Service(config)
    live.checkpoint()
    for batch in batches[:3]:
        live.handle(_frames(batch), RECEIVED)
    committed = live.counters.to_state()
    admitted = live.admission.admit(_frames(batches[2]), 0)  # the repeat: refused
    live.writers["rejects"].write(admitted.row)
    for writer in live.writers.values():
        if writer._open is not None:
            writer._open.handle.close()
            writer._open = None

    resumed = Service(config)
    try:
        assert resumed.counters.to_state() == committed
        assert resumed.counters.rejected_by_reason == {"bad_time": 5}
    finally:
        for writer in resumed.writers.values():
            writer.close()
    reasons = read_stream(out, "rejects")["reason"].to_pylist()
    assert "duplicate_message" not in reasons
