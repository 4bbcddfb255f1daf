"""EventPublisher over real sockets on loopback."""

from __future__ import annotations

import numpy as np
import pytest
import zmq
from wire_frames import (
    LIMITS,
    full_columns,
)

from turnstamp.errors import InputError
from turnstamp.wire.decode import decode_message
from turnstamp.wire.publisher import EventPublisher


@pytest.fixture
def context():
    ctx = zmq.Context()
    yield ctx
    ctx.destroy(linger=0)


def receive(socket, timeout_ms=5000):
    assert socket.poll(timeout_ms, zmq.POLLIN), "nothing arrived"
    return socket.recv_multipart(copy=False)


def test_push_publisher_to_pull_socket(context, rng):
    pull = context.socket(zmq.PULL)
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    columns = full_columns(1000, rng)
    with EventPublisher(f"tcp://127.0.0.1:{port}", "builder-3", time_scale="TT",
                        context=context, first_sequence=5) as publisher:
        assert publisher.send(**columns) == 5
        assert publisher.send(event_id=[1, 2], time_ns=[3, 4], weight=None) == 6
        assert publisher.sequence == 7
        first = decode_message(receive(pull), has_topic=False, **LIMITS)
        second = decode_message(receive(pull), has_topic=False, **LIMITS)
    assert publisher.closed
    assert (first.header.source, first.header.sequence, first.header.time_scale) == \
        ("builder-3", 5, "TT")
    assert first.header.sent_utc_ns is not None and first.topic is None
    for name, values in columns.items():
        np.testing.assert_array_equal(getattr(first.batch, name), values)
    assert second.header.sequence == 6 and second.batch.event_id.tolist() == [1, 2]
    pull.close(linger=0)


def test_pub_publisher_with_topic_to_sub_socket(context):
    sub = context.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"fast")
    port = sub.bind_to_random_port("tcp://127.0.0.1")
    publisher = EventPublisher(f"tcp://127.0.0.1:{port}", "builder-4", pattern="pub",
                               topic=b"fast", context=context, stamp_wall_clock=False)
    # A subscriber misses what is sent before the connection is up: send until one arrives.
    decoded = None
    for _ in range(100):
        publisher.send(event_id=[9], time_ns=[-5], energy_kev=[2.5])
        if sub.poll(50, zmq.POLLIN):
            decoded = decode_message(sub.recv_multipart(copy=False), has_topic=True, **LIMITS)
            break
    publisher.close(linger_ms=0)
    sub.close(linger=0)
    assert decoded is not None, "nothing arrived"
    assert decoded.topic == b"fast" and decoded.header.sent_utc_ns is None
    assert decoded.header.sequence < publisher.sequence
    assert decoded.batch.energy_kev.tolist() == [2.5] and decoded.batch.time_ns.tolist() == [-5]


def test_bound_publisher_and_connecting_puller(context):
    with EventPublisher("tcp://127.0.0.1:*", "b", bind=True, context=context) as publisher:
        pull = context.socket(zmq.PULL)
        pull.connect(publisher.last_endpoint)
        publisher.send(event_id=np.arange(3), time_ns=np.arange(3))
        assert decode_message(receive(pull), has_topic=False, **LIMITS).header.events == 3
        pull.close(linger=0)


def test_publisher_sequence_advances_only_on_send(context):
    publisher = EventPublisher("tcp://127.0.0.1:*", "b", bind=True, context=context,
                               send_timeout_ms=20)
    with pytest.raises(InputError):
        publisher.send(event_id=[1, 2], time_ns=[1])
    with pytest.raises(zmq.Again):  # bound PUSH without a peer: nowhere to queue
        publisher.send(event_id=[1], time_ns=[1])
    assert publisher.sequence == 0
    publisher.close(linger_ms=0)
    publisher.close()


@pytest.mark.parametrize("kwargs, field", [({"pattern": "req"}, "pattern"),
                                           ({"topic": b"t"}, "topic"),
                                           ({"source": "a b"}, "source"),
                                           ({"first_sequence": -1}, "first_sequence"),
                                           ({"time_scale": "TCB"}, "time_scale")])
def test_publisher_refuses_bad_settings(context, kwargs, field):
    arguments = {"endpoint": "tcp://127.0.0.1:1", "source": "b", "context": context, **kwargs}
    with pytest.raises(InputError) as info:
        EventPublisher(**arguments)
    assert info.value.field == field


def _numbers(pull) -> list[int]:
    got = []
    while pull.poll(200, zmq.POLLIN):
        got.append(decode_message(pull.recv_multipart(copy=False), has_topic=False,
                                  **LIMITS).header.sequence)
    return got


def test_resend_sends_exactly_the_missing_ranges_and_the_tail(context):
    pull = context.socket(zmq.PULL)
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    with EventPublisher(f"tcp://127.0.0.1:{port}", "b", context=context,
                        keep_last=50) as publisher:
        for _ in range(20):
            publisher.send(event_id=[1], time_ns=[1])
        assert len(_numbers(pull)) == 20
        # the service committed 0..4, 9..14 and nothing above 14
        report = {"committed_through": 4, "missing_ranges": [[5, 8]], "highest_sequence": 14}
        assert publisher.resend(report) == 4 + 5
        assert _numbers(pull) == [5, 6, 7, 8, 15, 16, 17, 18, 19]
        assert publisher.resend_after(17) == 2 and _numbers(pull) == [18, 19]
        with pytest.raises(InputError) as info:
            publisher.resend({**report, "missing_ranges_complete": False})
        assert info.value.field == "missing_ranges_complete"
    pull.close(linger=0)


def test_an_interrupted_resend_resumes_where_it_stopped(context):
    pull = context.socket(zmq.PULL)
    pull.setsockopt(zmq.RCVHWM, 1)
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    publisher = EventPublisher(f"tcp://127.0.0.1:{port}", "b", context=context, keep_last=400,
                               send_timeout_ms=50, high_water_mark=1)
    for _ in range(400):  # the receiver reads nothing yet: sends start timing out
        try:
            publisher.send(event_id=np.arange(2000), time_ns=np.arange(2000))
        except zmq.Again:
            break
    sent = publisher.sequence
    assert 0 < sent < 400
    # a send times out partway: the place is kept
    first = publisher.resend({"missing_ranges": [[0, sent - 1]], "highest_sequence": sent - 1})
    assert first < sent and publisher.resend_pending == sent - first
    received = []
    while publisher.resend_pending:  # read a little, resume, until everything went
        received += _numbers(pull)
        publisher.resend()
    received += _numbers(pull)
    assert sorted(received) == sorted(list(range(sent)) * 2)  # once, and once resent
    publisher.close(linger_ms=0)
    pull.close(linger=0)


def test_resend_refuses_what_is_no_longer_kept(context):
    # a send waits for the puller to connect (with no wait it raced the connection
    # on a busy machine and failed with zmq.Again)
    publisher = EventPublisher("tcp://127.0.0.1:*", "b", bind=True, context=context,
                               keep_last=2, send_timeout_ms=10_000)
    pull = context.socket(zmq.PULL)
    pull.connect(publisher.last_endpoint)
    for _ in range(5):
        publisher.send(event_id=[1], time_ns=[1])
    with pytest.raises(InputError, match="no longer kept"):
        publisher.resend({"missing_ranges": [[1, 1]], "highest_sequence": 4})
    assert publisher.resend_pending == 0
    publisher.close(linger_ms=0)
    pull.close(linger=0)
