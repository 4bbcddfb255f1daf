"""Events outside the spin model's validity window are said so everywhere (issue 10, item 2):
status.json (counts and a warning naming the target and the window), the live view
(never a bare "no events yet"), the clock check, and after a restart."""

import threading
import time
from pathlib import Path

import zmq

from turnstamp.config import load_config
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.service.loop import Service
from turnstamp.views.live import render_status
from turnstamp.views.live.screen import screen_text
from turnstamp.wire.encode import encode_message


def wait_for(predicate, timeout=60.0):
    deadline = time.time() + timeout
    while time.time() < deadline:
        if predicate():
            return True
        time.sleep(0.05)
    return False


def serve(config, messages=()):
    """Run a Service on a thread, push ``messages``, wait until they are counted, stop;
    returns the service."""
    service = Service(config)
    thread = threading.Thread(target=service.run, daemon=True)
    thread.start()
    assert wait_for(lambda: service.endpoints)
    if messages:
        context = zmq.Context()
        with context.socket(zmq.PUSH) as sock:
            sock.setsockopt(zmq.LINGER, 5000)
            sock.connect(service.endpoints["intake"][0])
            for frames in messages:
                sock.send_multipart(frames)
        context.term()
        assert wait_for(lambda: service.counters.messages_received == len(messages))
    service.stop()
    thread.join(timeout=60)
    assert not thread.is_alive()
    return service


def test_events_outside_validity_are_reported_in_status_live_view_and_clock(
        service_config, tmp_path, demo_env, lantern, night_start_tt):
    path = service_config()
    model = tmp_path / "lantern.toml"  # the service's own copy: its window ends in 2024
    model.write_text(model.read_text().replace('start_mjd_tdb = "61000"',
                                               'start_mjd_tdb = "60000"')
                     .replace('end_mjd_tdb = "62000"', 'end_mjd_tdb = "60500"'))
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=40, pulsed_rate_hz=100,
                     background_rate_hz=400, template=lantern.template, batch_seconds=10,
                     source="kestrel-test")
    batches = list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))
    messages = [encode_message(b.source, b.sequence, "UTC", b.columns()) for b in batches]
    config = load_config(path)
    service = serve(config, messages)
    status = service.status("stopped")
    tagged = status["counters"]["events_tagged"]
    assert tagged > 0
    target = status["targets"][0]
    assert target["excluded_from_statistics"] == tagged
    assert status["tagged_with_problems"]["OUTSIDE_MODEL_VALIDITY"] == tagged
    assert target["recipes"][0]["events"] == 0
    warning = next(w for w in status["warnings"] if "validity window" in w)
    assert warning.startswith(f"lantern: {tagged:,} events outside the validity window")
    assert "MJD 60000 to 60500 TDB" in warning
    assert target["clock"]["lines"][0].startswith(f"{tagged:,} events of lantern fell outside")
    # the live view: totals line, per-recipe reason, never a bare "no events yet"
    for text in (render_status(status, width=100), screen_text(status, width=80, styles=False)):
        assert f"{tagged:,} outside" in text and "validity" in text
        assert "no events yet" not in text
    plain = render_status(status, width=100)
    assert f"tagged with a problem: {tagged:,} outside model validity" in plain
    # a restart resumes the counts from the checkpoint
    again = serve(config)
    assert again.pipeline.quality.excluded("lantern") == tagged
    assert Path(config.output.directory, "status.json").exists()
