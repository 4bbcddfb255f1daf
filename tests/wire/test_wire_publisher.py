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
