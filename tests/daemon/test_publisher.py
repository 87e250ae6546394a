"""Events: every event on the PUB socket as [topic, JSON] and in events.jsonl."""

import json
import time

import pytest
import zmq

from livequant.daemon.publisher import EventPublisher


def test_events_reach_subscribers_and_the_file(tmp_path):
    events_file = tmp_path / "events.jsonl"
    with zmq.Context() as ctx:
        pub = EventPublisher(ctx, "tcp://127.0.0.1:0", events_file)
        endpoint = pub.start()
        sub = ctx.socket(zmq.SUB)
        sub.setsockopt(zmq.LINGER, 0)
        sub.setsockopt(zmq.SUBSCRIBE, b"frame")
        sub.connect(endpoint)
        try:
            # PUB/SUB drops messages until the subscription has propagated
            # (pyzmq docs, "slow joiner"): publish until one arrives.
            got = None
            for k in range(100):
                pub.publish("frame", {"frame_id": f"f{k}", "value": float("nan")})
                pub.publish("status", {"event": "heartbeat"})
                if sub.poll(100):
                    got = sub.recv_multipart()
                    break
            assert got is not None, "no event arrived"
            topic, payload = got
            assert topic == b"frame"
            data = json.loads(payload)
            assert data["frame_id"].startswith("f") and data["value"] is None  # NaN -> null
        finally:
            sub.close(linger=0)
            pub.close()
    lines = [json.loads(line) for line in events_file.read_text().splitlines()]
    assert len(lines) == 2 * (k + 1)  # the file keeps every event, sent or not
    assert [e["seq"] for e in lines] == list(range(1, len(lines) + 1))
    assert {e["topic"] for e in lines} == {"frame", "status"}


def test_unknown_topic_is_refused(tmp_path):
    pub = EventPublisher(None, "", tmp_path / "e.jsonl")
    with pytest.raises(ValueError, match="`topic`"):
        pub.publish("gossip", {})
    pub.close()


def test_file_is_appended_across_restarts(tmp_path):
    for run in range(2):
        pub = EventPublisher(None, "", tmp_path / "e.jsonl")
        pub.publish("status", {"event": "started", "run": run, "t": time.time()})
        pub.close()
    runs = [json.loads(x)["data"]["run"] for x in (tmp_path / "e.jsonl").read_text().splitlines()]
    assert runs == [0, 1]
