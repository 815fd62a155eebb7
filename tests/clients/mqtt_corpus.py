"""Publish a corpus of MQTT messages with an independent client (Eclipse
paho-mqtt) and collect what outrider reports on <prefix>/_rejected.

The corpus is JSON lines: {"topic": str, "payload_b64": str}. Payloads are
base64 so that the corpus can hold invalid UTF-8 and oversize messages.
Prints one JSON object on stdout: {"published": n, "rejections": [...]}.

--rate N publishes at most N messages a second (0: as fast as the client
goes), for loads that must last while a test kills or restarts things.
paho-mqtt re-sends QoS 1 publishes that were not acknowledged when its
connection drops (a broker restart), so "published" counts each message
the broker acknowledged, once.
"""

import argparse
import base64
import json
import sys
import threading
import time

import paho.mqtt.client as mqtt


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--corpus", required=True)
    ap.add_argument("--prefix", default="outrider")
    ap.add_argument("--expect-rejections", type=int, default=0)
    ap.add_argument("--timeout", type=float, default=60.0)
    ap.add_argument("--client-id", default="corpuspublisher")
    ap.add_argument("--rate", type=float, default=0.0)
    ap.add_argument("--username")
    ap.add_argument("--password")
    args = ap.parse_args()

    with open(args.corpus, encoding="utf-8") as f:
        corpus = [json.loads(line) for line in f if line.strip()]

    rejections = []
    lock = threading.Lock()
    subscribed = threading.Event()

    def on_connect(client, userdata, flags, reason_code, properties):
        client.subscribe(f"{args.prefix}/_rejected", qos=1)

    def on_subscribe(client, userdata, mid, reason_codes, properties):
        subscribed.set()

    def on_message(client, userdata, msg):
        with lock:
            rejections.append(json.loads(msg.payload.decode("utf-8")))

    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=args.client_id)
    if args.username:
        client.username_pw_set(args.username, args.password)
    client.max_inflight_messages_set(100)
    client.max_queued_messages_set(0)
    client.on_connect = on_connect
    client.on_subscribe = on_subscribe
    client.on_message = on_message
    client.connect("127.0.0.1", args.port)
    client.loop_start()
    if not subscribed.wait(10):
        print("could not subscribe to the rejection topic", file=sys.stderr)
        return 1

    infos = []
    started = time.monotonic()
    for i, item in enumerate(corpus):
        if args.rate > 0:
            due = started + i / args.rate
            pause = due - time.monotonic()
            if pause > 0:
                time.sleep(pause)
        payload = base64.b64decode(item["payload_b64"])
        infos.append(client.publish(item["topic"], payload, qos=1))
    deadline = time.monotonic() + args.timeout
    # Not wait_for_publish(): it raises for a message handed over while
    # the broker was away (rc NO_CONN), although paho keeps that message
    # and sends it on reconnecting. `_published` (paho 2.2.0, pinned) is
    # what wait_for_publish itself waits on: set when the PUBACK arrives.
    for info in infos:
        try:
            info.wait_for_publish(max(0.1, deadline - time.monotonic()))
        except (RuntimeError, ValueError):
            with info._condition:
                while not info._published and time.monotonic() < deadline:
                    info._condition.wait(0.1)
    published = sum(1 for i in infos if i._published)

    while time.monotonic() < deadline:
        with lock:
            if len(rejections) >= args.expect_rejections:
                break
        time.sleep(0.05)
    client.loop_stop()
    client.disconnect()
    with lock:
        print(json.dumps({"published": published, "rejections": rejections}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
