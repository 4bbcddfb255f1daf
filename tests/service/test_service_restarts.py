"""Restarts that must not roll back, delete or double-count committed data: kills
after a clean stop, two kills in quick succession, junk before the first good
message, and leftovers of an interrupted checkpoint."""

import hashlib

import numpy as np
import pyarrow as pa
from running import leave_as_killed

from turnstamp.config import load_config
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.files.reader import read_stream, stream_files
from turnstamp.service.loop import Service
from turnstamp.wire.encode import encode_message

RECEIVED = 1_796_180_400.0  # 2026-12-02T03:00:00 UTC, in the demo night: s since 1970


def _night(demo_env, lantern, night_start_tt, seconds=20):
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=seconds, pulsed_rate_hz=100,
                     background_rate_hz=900, template=lantern.template, batch_seconds=2.0,
                     seed=11, source="kestrel-test")
    return list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))


def _frames(batch):
    return encode_message(batch.source, batch.sequence, "UTC", batch.columns())


def _stop(service: Service) -> None:
    """A clean stop (SIGTERM): last updates, a checkpoint, every file closed."""
    service._finish()


def _hashes(out):
    return {path.name: hashlib.sha256(path.read_bytes()).hexdigest()
            for stem in ("archive", "rejects", "ledger") for path in stream_files(out, stem)}


def test_a_kill_after_a_clean_stop_never_rewrites_closed_files(tmp_path, service_config,
                                                               demo_env, lantern,
                                                               night_start_tt):
    config = load_config(service_config())
    out = tmp_path / "out"
    batches = _night(demo_env, lantern, night_start_tt)
    first = Service(config)
    for batch in batches:
        first.handle(_frames(batch), RECEIVED)
    _stop(first)
    closed = _hashes(out)
    archived = read_stream(out, "archive").num_rows
    assert archived > 0

    second = Service(config)
    second.handle([b"not json", b"\x00\x01"], RECEIVED)  # one malformed message
    second.checkpoint()
    leave_as_killed(second)

    third = Service(config)
    try:
        assert read_stream(out, "archive").num_rows == archived
        after = _hashes(out)
        assert {name: after.get(name) for name in closed} == closed  # unchanged since closed
        assert third.counters.messages_received == len(batches) + 1
        assert third.counters.reconciles()
    finally:
        _stop(third)


def test_two_quick_kills_count_every_event_once(tmp_path, service_config, demo_env, lantern,
                                                night_start_tt):
    config = load_config(service_config())
    out = tmp_path / "out"
    batches = _night(demo_env, lantern, night_start_tt)
    first = Service(config)
    for batch in batches[:4]:
        first.handle(_frames(batch), RECEIVED)
    first.checkpoint()
    for batch in batches[4:7]:
        first.handle(_frames(batch), RECEIVED)
    committed = first.counters.to_state()
    statistics = first.pipeline.significance()
    leave_as_killed(first)

    second = Service(config)  # resumes, writes its first checkpoint, dies at once
    assert second.counters.to_state() == committed
    second.checkpoint()
    leave_as_killed(second)
    third = Service(config)  # and once more, before anything new arrived
    third.checkpoint()
    leave_as_killed(third)

    fourth = Service(config)
    try:
        assert fourth.counters.to_state() == committed
        assert fourth.counters.events_received == sum(len(b) for b in batches[:7])
        assert fourth.pipeline.significance() == statistics
        assert read_stream(out, "archive").num_rows == committed["events_tagged"]
    finally:
        _stop(fourth)


def test_junk_before_the_first_good_message_is_refused_and_nothing_dies(tmp_path,
                                                                        service_config,
                                                                        demo_env, lantern,
                                                                        night_start_tt):
    config = load_config(service_config())
    out = tmp_path / "out"
    batches = _night(demo_env, lantern, night_start_tt, seconds=6)
    service = Service(config)
    service.handle([b"\xff\xfe garbage"], RECEIVED)  # before any good message
    for batch in batches:
        service.handle(_frames(batch), RECEIVED)
    service.handle([b"{}", b"more junk"], RECEIVED)
    _stop(service)
    counters = service.counters
    assert counters.messages_received == len(batches) + 2 and counters.reconciles()
    rejects = read_stream(out, "rejects")
    assert set(rejects["reason"].to_pylist()) == {"malformed_message"}
    assert np.asarray(read_stream(out, "ledger")["events"]).sum() == sum(len(b) for b in batches)
    for stem in ("archive", "rejects", "ledger"):
        for path in stream_files(out, stem):
            with pa.memory_map(str(path)) as source:
                pa.ipc.open_stream(source).read_all()  # closed files open with pyarrow


def test_leftovers_of_an_interrupted_checkpoint_are_removed_at_start(tmp_path, service_config):
    config = load_config(service_config())
    out = tmp_path / "out"
    out.mkdir()
    stale = [out / ".checkpoint.arrow.0123456789abcdef0123456789abcdef.tmp",
             out / ".checkpoint.json.0123456789abcdef0123456789abcdef.tmp",
             out / ".status.json.0123456789abcdef0123456789abcdef.tmp"]
    for path in stale:
        path.write_bytes(b"half a checkpoint")
    service = Service(config)
    try:
        assert not any(path.exists() for path in stale)
    finally:
        _stop(service)


def test_the_checkpoint_is_binary_and_restores_the_statistics_exactly(tmp_path, service_config,
                                                                      demo_env, lantern,
                                                                      night_start_tt):
    from turnstamp.service.checkpoint import CHECKPOINT, read_checkpoint

    config = load_config(service_config())
    out = tmp_path / "out"
    service = Service(config)
    for batch in _night(demo_env, lantern, night_start_tt, seconds=10):
        service.handle(_frames(batch), RECEIVED)
    service.checkpoint()
    data = (out / CHECKPOINT).read_bytes()
    assert data[:6] == b"ARROW1"  # an Arrow file of arrays, not a text document
    saved = read_checkpoint(out)
    assert saved["pipeline"] == service.pipeline.to_state()  # the same numbers, exactly
    assert saved["counters"] == service.counters.to_state()
    _stop(service)


def test_closed_files_open_in_pyarrow_pandas_polars_and_duckdb(tmp_path, service_config,
                                                               demo_env, lantern,
                                                               night_start_tt):
    # the calls the README gives for reading the service's files
    import pytest

    pandas = pytest.importorskip("pandas")
    polars = pytest.importorskip("polars")
    duckdb = pytest.importorskip("duckdb")
    config = load_config(service_config())
    out = tmp_path / "out"
    service = Service(config)
    service.handle([b"junk first"], RECEIVED)  # the rejects file gets two dictionaries
    for batch in _night(demo_env, lantern, night_start_tt, seconds=6):
        service.handle(_frames(batch), RECEIVED)
    service.handle([b"{}", b"junk last"], RECEIVED)
    _stop(service)
    for stem in ("archive", "rejects", "ledger", "significance", "profiles", "clock"):
        for path in stream_files(out, stem):
            events = pa.ipc.open_stream(str(path)).read_all()
            assert isinstance(events.to_pandas(), pandas.DataFrame)
            assert polars.read_ipc_stream(path).shape == (events.num_rows, events.num_columns)
            ((count,),) = duckdb.sql("SELECT count(*) FROM events").fetchall()
            assert count == events.num_rows
