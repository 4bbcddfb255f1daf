"""Messages that queued up are fed and committed together: the files say exactly what
handling them one by one says, and a crash in the middle of such a commit loses
those messages whole (their sender resends them), never part of one."""

import numpy as np
from running import leave_as_killed

from turnstamp.config import load_config
from turnstamp.core.accounting import ACCEPTED, MessageRecord
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.files.reader import read_arrow_file, read_stream, stream_files
from turnstamp.service.loop import Service
from turnstamp.service.recovery import claimed
from turnstamp.wire.encode import encode_message

RECEIVED = 1_796_180_400.0  # 2026-12-02T03:00:00 UTC, in the demo night: s since 1970


def _messages(demo_env, lantern, night_start_tt):
    """A queue as the world fills it: good messages, a malformed one, a repeat, a gap,
    a second source, and one without weights (which cannot join the others)."""
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=16, pulsed_rate_hz=100,
                     background_rate_hz=900, template=lantern.template, batch_seconds=2.0,
                     seed=5, source="kestrel-test")
    batches = list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))
    batches[1].time_ns[:4] = np.iinfo(np.int64).min  # bad times, refused event by event

    def frames(batch, source=None, sequence=None, drop=()):
        columns = {k: v for k, v in batch.columns().items() if k not in drop}
        return encode_message(source or batch.source,
                              batch.sequence if sequence is None else sequence, "UTC", columns)

    return [frames(batches[0]), frames(batches[1]), [b"not json", b"\x00"],
            frames(batches[2]), frames(batches[1]),  # a repeat: refused whole
            frames(batches[4]),  # sequence 3 missing before it
            frames(batches[5], source="second-builder", sequence=0),
            frames(batches[6], drop=("weight",)), frames(batches[7])]


def _rows(out, stem):
    table = read_stream(out, stem)
    keep = [name for name in table.column_names if name != "received_utc_ns"]
    return table.select(keep).to_pylist()


def test_queued_messages_commit_as_handling_them_one_by_one_does(
        tmp_path, service_config, demo_env, lantern, night_start_tt):
    messages = _messages(demo_env, lantern, night_start_tt)
    outputs = {}
    for way in ("one_by_one", "queued"):
        config = load_config(service_config())
        config = config.model_copy(update={"output": config.output.model_copy(
            update={"directory": tmp_path / way})})
        service = Service(config)
        if way == "queued":
            service.handle_queued([(frames, RECEIVED) for frames in messages])
        else:
            for frames in messages:
                service.handle(frames, RECEIVED)
        service._finish()
        outputs[way] = service
    one, queued = (tmp_path / "one_by_one", tmp_path / "queued")
    for stem in ("archive", "rejects", "ledger"):
        assert _rows(queued, stem) == _rows(one, stem), stem
    assert outputs["queued"].counters.to_state() == outputs["one_by_one"].counters.to_state()
    assert outputs["queued"].counters.reconciles()
    # fewer commits than messages: (0, 1) | refused | (2) | repeat | (4, second-builder 0)
    # | no weights | (7)
    (ledger,) = stream_files(queued, "ledger")
    assert [b.num_rows for b in read_arrow_file(ledger).to_batches()] == [2, 1, 1, 1, 2, 1, 1]


def test_a_crash_inside_a_queued_commit_loses_those_messages_whole(
        tmp_path, service_config, demo_env, lantern, night_start_tt):
    config = load_config(service_config())
    out = tmp_path / "out"
    messages = _messages(demo_env, lantern, night_start_tt)
    live = Service(config)
    live.handle_queued([(frames, RECEIVED) for frames in messages[:2]])
    live.checkpoint()
    live.handle(messages[3], RECEIVED)  # after the checkpoint: replayed
    committed = live.counters.to_state()

    def killed(table):  # the archive and rejects rows are out, the ledger rows not
        raise KeyboardInterrupt

    live.writers["ledger"].write = killed
    try:
        live.handle_queued([(frames, RECEIVED) for frames in messages[5:7]])
    except KeyboardInterrupt:
        pass
    leave_as_killed(live)
    in_flight = read_stream(out, "archive")
    assert "second-builder" in set(in_flight["source"].to_pylist())  # its rows are out

    resumed = Service(config)
    try:
        assert resumed.counters.to_state() == committed and resumed.counters.reconciles()
        assert any("in flight" in note for note in resumed.notes)
        resumed.handle_queued([(frames, RECEIVED) for frames in messages[5:7]])  # resent
        assert resumed.counters.missing_messages == 1 and resumed.counters.reconciles()
    finally:
        for writer in resumed.writers.values():
            writer.close()
    archive = read_stream(out, "archive")
    keys = list(zip(archive["source"].to_pylist(), archive["sequence"].to_pylist(),
                    archive["event_id"].to_pylist(), strict=True))
    assert len(keys) == len(set(keys)) == resumed.counters.events_tagged


def _record(source, sequence):
    return MessageRecord(0, source, sequence, ACCEPTED, 1, 1)


def test_a_commit_never_claims_the_batches_of_a_new_run_in_flight():
    # messages (s, 0) and (s, 1) committed together; then the source restarted and its
    # new (s, 0) is in flight: its archive batch is not the committed one's
    commits = [[_record("s", 0), _record("s", 1)]]
    archive = [("lantern", {("s", 0), ("s", 1)}), ("lantern", {("s", 0)})]
    assert claimed(commits, archive, [], []) == (1, 0)
    two_targets = [("lantern", {("s", 0), ("s", 1)}), ("ember", {("s", 1)}),
                   ("lantern", {("s", 0)})]
    assert claimed(commits, two_targets, [], []) == (2, 0)
