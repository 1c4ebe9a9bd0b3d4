"""The subscriber on the real broker, with a handler of the test's own: a message whose
handling meets a transient fault (the store busy) is not acknowledged, and the broker
delivers it again (the session resumed), before the messages that came after it; a
message handled for good is answered once and never delivered again. Two subscribers of
one shared-subscription group share the messages, each message once; a session that held
the plain subscription does not get each message twice; a stopped member's share waits in
its session; resuming leaks no sockets; a client id taken twice is logged."""

from __future__ import annotations

import gc
import logging
import os
import threading
import time
from collections.abc import Callable

import pytest
from curvekeeper.mqtt import Reply, Subscriber, Topics, subscriber
from curvekeeper.mqtt.subscriber import Handler

from tests.mqtt.broker import Publisher, Results, broker_url, unique_root, wait_subscribed

GROUP = "ck-test-group"


def test_a_message_met_by_a_transient_fault_comes_again_in_order() -> None:
    url, root = broker_url(), unique_root()
    calls: list[bytes] = []
    lock = threading.Lock()

    def handle(channel: str, payload: bytes) -> Reply:
        with lock:
            calls.append(payload)
            busy = payload == b"busy" and calls.count(b"busy") < 3
        if busy:
            return Reply(503, {"error": {"code": "store_busy", "message": "busy", "details": None}}, ack=False)
        return Reply(200, {"got": payload.decode()})

    sub = Subscriber(url, handle, client_id=f"ck-{root.split('/')[0]}", topics=Topics(root), session_expiry_s=60)
    pub, results = Publisher(root), Results(root)
    sub.start()
    try:
        wait_subscribed(pub, results)
        for payload in (b"first", b"busy", b"after"):
            pub.send("ch.one", payload)
        deadline = time.monotonic() + 60
        while len([1 for ch, _ in results.snapshot() if ch == "ch.one"]) < 3:
            assert time.monotonic() < deadline, results.snapshot()
            time.sleep(0.05)
        time.sleep(0.5)  # nothing more comes
        got = [body for ch, body in results.snapshot() if ch == "ch.one"]
        assert got == [{"got": "first"}, {"got": "busy"}, {"got": "after"}]
        with lock:
            mine = [c for c in calls if c in (b"first", b"busy", b"after")]
        # the refused delivery came twice more (the third was learned); "first" never again
        assert mine.count(b"busy") == 3 and mine.count(b"first") == 1
        last_busy = max(i for i, c in enumerate(mine) if c == b"busy")
        assert b"after" in mine[last_busy:], mine  # learned after the busy one was
    finally:
        sub.stop()
        pub.close()
        results.close()


def _recorder() -> tuple[list[bytes], threading.Lock, Handler]:
    seen: list[bytes] = []
    lock = threading.Lock()

    def handle(channel: str, payload: bytes) -> Reply:
        with lock:
            seen.append(payload)
        return Reply(200, {"got": payload.decode()})

    return seen, lock, handle


def _until(cond: Callable[[], bool], what: str, timeout: float = 30.0) -> None:
    deadline = time.monotonic() + timeout
    while not cond():
        assert time.monotonic() < deadline, what
        time.sleep(0.02)


def _wait_both(pub: Publisher, results: Results, a: list[bytes], b: list[bytes], lock: threading.Lock) -> None:
    """Probes until each of two group members has answered one: both are subscribed."""
    deadline = time.monotonic() + 60
    while True:
        pub.send("no.such.probe", b"probe")
        time.sleep(0.1)
        with lock:
            if b"probe" in a and b"probe" in b:
                return
        assert time.monotonic() < deadline, "the two subscribers never both answered"


def test_two_subscribers_of_one_group_share_the_messages_each_once() -> None:
    url, root = broker_url(), unique_root()
    a_seen, lock, a_handle = _recorder()
    b_seen: list[bytes] = []

    def b_handle(channel: str, payload: bytes) -> Reply:
        with lock:
            b_seen.append(payload)
        return Reply(200, {"got": payload.decode()})

    base = f"ck-{root.split('/')[0]}"
    subs = [Subscriber(url, h, client_id=f"{base}-{n}", topics=Topics(root, GROUP), session_expiry_s=60)
            for n, h in (("a", a_handle), ("b", b_handle))]
    pub, results = Publisher(root), Results(root)
    for s in subs:
        s.start()
    try:
        _wait_both(pub, results, a_seen, b_seen, lock)
        sent = [f"m{i}".encode() for i in range(40)]
        for p in sent:
            pub.send("ch.shared", p)
        _until(lambda: len([1 for ch, _ in results.snapshot() if ch == "ch.shared"]) >= 40, "messages missing")
        time.sleep(0.5)  # nothing more comes
        with lock:
            a, b = [p for p in a_seen if p != b"probe"], [p for p in b_seen if p != b"probe"]
        assert sorted(a + b) == sorted(sent), "a message lost or handled twice"
        assert a and b, f"one member took every message: {len(a)} and {len(b)}"
    finally:
        for s in subs:
            s.stop()
        pub.close()
        results.close()


def test_a_session_subscribed_before_sharing_does_not_get_each_message_twice() -> None:
    """The session of a process that ran with a plain subscription keeps it: the subscriber
    unsubscribes it when it subscribes as a group, or every message would come twice."""
    url, root = broker_url(), unique_root()
    client_id = f"ck-{root.split('/')[0]}"
    seen, lock, handle = _recorder()
    pub, results = Publisher(root), Results(root)
    plain = Subscriber(url, handle, client_id=client_id, topics=Topics(root), session_expiry_s=60)
    plain.start()
    try:
        wait_subscribed(pub, results)
    finally:
        plain.stop()
    shared = Subscriber(url, handle, client_id=client_id, topics=Topics(root, GROUP), session_expiry_s=60)
    shared.start()
    try:
        wait_subscribed(pub, results)
        for i in range(10):
            pub.send("ch.upgrade", f"u{i}".encode())
        _until(lambda: len([1 for ch, _ in results.snapshot() if ch == "ch.upgrade"]) >= 10, "messages missing")
        time.sleep(0.5)
        with lock:
            mine = [p for p in seen if p.startswith(b"u")]
        assert sorted(mine) == sorted(f"u{i}".encode() for i in range(10)), mine
    finally:
        shared.stop()
        pub.close()
        results.close()


def test_a_stopped_members_share_waits_in_its_session_until_it_returns() -> None:
    """What docs/decisions/mqtt-scaling.md says of a process that is away: the broker
    (Mosquitto 2) goes on giving it its share, queued in its session, and delivers the queue
    when the process connects again with its client id; the other member never sees those."""
    url, root = broker_url(), unique_root()
    a_seen, lock, a_handle = _recorder()
    b_seen: list[bytes] = []

    def b_handle(channel: str, payload: bytes) -> Reply:
        with lock:
            b_seen.append(payload)
        return Reply(200, {"got": payload.decode()})

    base = f"ck-{root.split('/')[0]}"
    a = Subscriber(url, a_handle, client_id=f"{base}-a", topics=Topics(root, GROUP), session_expiry_s=60)
    b = Subscriber(url, b_handle, client_id=f"{base}-b", topics=Topics(root, GROUP), session_expiry_s=60)
    pub, results = Publisher(root), Results(root)
    a.start()
    b.start()
    try:
        _wait_both(pub, results, a_seen, b_seen, lock)
        b.stop()
        sent = [f"w{i}".encode() for i in range(20)]
        for p in sent:
            pub.send("ch.away", p)
        _until(lambda: len([1 for ch, _ in results.snapshot() if ch == "ch.away"]) >= 1, "a learned nothing")
        time.sleep(0.5)
        with lock:
            by_a = [p for p in a_seen if p.startswith(b"w")]
        assert 0 < len(by_a) < 20, f"the live member got {len(by_a)} of 20"
        b = Subscriber(url, b_handle, client_id=f"{base}-b", topics=Topics(root, GROUP), session_expiry_s=60)
        b.start()
        _until(lambda: len([1 for ch, _ in results.snapshot() if ch == "ch.away"]) >= 20, "b's queue never came")
        with lock:
            by_b = [p for p in b_seen if p.startswith(b"w")]
        assert sorted(by_a + by_b) == sorted(sent)
    finally:
        a.stop()
        b.stop()
        pub.close()
        results.close()


def test_resuming_the_session_many_times_leaks_no_sockets(monkeypatch: pytest.MonkeyPatch) -> None:
    """Each resume makes a new paho client and closes the old one's sockets (paho 2.2's
    loop_start on the old one drops its socket pair unclosed each time: a ResourceWarning,
    an error here): no warning, and the open files stay level over 25 resumes."""
    monkeypatch.setattr(subscriber, "RETRY_S", 0.01)
    monkeypatch.setattr(subscriber, "RETRY_MAX_S", 0.01)
    url, root = broker_url(), unique_root()
    refusals = 25
    calls: list[bytes] = []

    def handle(channel: str, payload: bytes) -> Reply:
        calls.append(payload)
        if payload == b"busy" and calls.count(b"busy") <= refusals:
            return Reply(503, {"error": {"code": "store_busy", "message": "busy", "details": None}}, ack=False)
        return Reply(200, {"got": payload.decode()})

    sub = Subscriber(url, handle, client_id=f"ck-{root.split('/')[0]}", topics=Topics(root), session_expiry_s=60)
    pub, results = Publisher(root), Results(root)
    sub.start()
    try:
        wait_subscribed(pub, results)
        gc.collect()
        before = len(os.listdir("/proc/self/fd"))
        pub.send("ch.resume", b"busy")
        _until(lambda: any(ch == "ch.resume" for ch, _ in results.snapshot()), "never learned", timeout=120)
        gc.collect()
        after = len(os.listdir("/proc/self/fd"))
        assert calls.count(b"busy") == refusals + 1
        assert after - before <= 2, f"{after - before} more open files after {refusals} resumes"
    finally:
        sub.stop()
        pub.close()
        results.close()


def test_a_second_process_on_the_same_client_id_is_logged(caplog: pytest.LogCaptureFixture) -> None:
    url, root = broker_url(), unique_root()
    _seen, _lock, handle = _recorder()
    client_id = f"ck-{root.split('/')[0]}"
    first = Subscriber(url, handle, client_id=client_id, topics=Topics(root), session_expiry_s=60)
    pub, results = Publisher(root), Results(root)
    first.start()
    second: Subscriber | None = None
    try:
        wait_subscribed(pub, results)
        with caplog.at_level(logging.WARNING, logger="curvekeeper.mqtt"):
            second = Subscriber(url, handle, client_id=client_id, topics=Topics(root), session_expiry_s=60)
            second.start()
            _until(lambda: "CURVEKEEPER_MQTT_CLIENT_ID of its own" in caplog.text, "nothing logged")
        assert repr(client_id) in caplog.text
    finally:
        if second is not None:
            second.stop()
        first.stop()
        pub.close()
        results.close()


def test_a_member_retired_with_session_expiry_0_learns_its_queue_and_then_gets_nothing() -> None:
    """Retiring a process's client id for good: started once more on its session with
    expiry 0, it learns the share that waited for it, and once stopped (unsubscribed, its
    session ended) the other member takes every message."""
    url, root = broker_url(), unique_root()
    a_seen, lock, a_handle = _recorder()
    b_seen: list[bytes] = []

    def b_handle(channel: str, payload: bytes) -> Reply:
        time.sleep(0.01)  # slow: stopped while its queue is still coming
        with lock:
            b_seen.append(payload)
        return Reply(200, {"got": payload.decode()})

    base = f"ck-{root.split('/')[0]}"
    a = Subscriber(url, a_handle, client_id=f"{base}-a", topics=Topics(root, GROUP), session_expiry_s=60)
    b = Subscriber(url, b_handle, client_id=f"{base}-b", topics=Topics(root, GROUP), session_expiry_s=60)
    pub, results = Publisher(root), Results(root)
    a.start()
    b.start()
    try:
        _wait_both(pub, results, a_seen, b_seen, lock)
        b.stop()
        # more than the broker sends at once (Mosquitto: 20 in flight per client): most of b's
        # share is still at the broker when b is stopped
        waiting = [f"q{i}".encode() for i in range(200)]
        for p in waiting:
            pub.send("ch.retire", p)
        b = Subscriber(url, b_handle, client_id=f"{base}-b", topics=Topics(root, GROUP), session_expiry_s=0)
        b.start()
        _until(lambda: any(p.startswith(b"q") for p in list(b_seen)), "b's queue never came")
        b.stop()  # retires at once: unsubscribes, learns what is left of its queue, ends the session
        after = [f"z{i}".encode() for i in range(10)]
        for p in after:
            pub.send("ch.retire", p)
        _until(lambda: len([1 for ch, _ in results.snapshot() if ch == "ch.retire"]) >= 210, "messages lost")
        time.sleep(0.5)
        with lock:
            by_a = [p for p in a_seen if p[:1] in (b"q", b"z")]
            by_b = [p for p in b_seen if p[:1] in (b"q", b"z")]
        assert sorted(by_a + by_b) == sorted(waiting + after), "a message lost or learned twice"
        assert [p for p in by_b if p.startswith(b"q")], "b's share did not wait for it"
        assert not [p for p in by_b if p.startswith(b"z")], "the retired member still got messages"
    finally:
        a.stop()
        b.stop()
        pub.close()
        results.close()
