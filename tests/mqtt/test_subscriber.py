"""The subscriber on the real broker, with a handler of the test's own: a message whose
handling meets a transient fault (the store busy) is not acknowledged, and the broker
delivers it again (the session resumed), before the messages that came after it; a
message handled for good is answered once and never delivered again."""

from __future__ import annotations

import threading
import time

from curvekeeper.mqtt import Reply, Subscriber, Topics

from tests.mqtt.broker import Publisher, Results, broker_url, unique_root, wait_subscribed


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
