"""What Mosquitto's durability settings cost and what they buy, for a
subscriber like outrider (QoS 1, fixed client id, clean session off).

    target/py/bin/python benches/mosquitto_settings.py [N]    (default 5000)

For each setting it starts Mosquitto 2 (/usr/sbin/mosquitto) on a free
loopback port, with a persistent-session subscriber created and then:

- online: the subscriber connected, publishes N QoS 1 messages (paho-mqtt,
  100 in flight) and times until every PUBACK is back and the subscriber
  has received all N;
- offline: the subscriber away, publishes N and times the PUBACKs (the
  broker queues them), then counts what the subscriber gets on its return;
- crash: the subscriber away, publishes N (all PUBACKed), kill -9 of the
  broker, start it again, and counts what the subscriber gets.

Prints one Markdown table row per setting and test. Broker-side only: no
outrider in the loop, so the figures are the broker's cost.
"""

import os
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time

import paho.mqtt.client as mqtt

MOSQUITTO = "/usr/sbin/mosquitto"
TOPIC = "outrider/KB-01/observation"
PAYLOAD = (
    b'{"observationID":"b-%06d","deploymentID":"KB-01","eventStart":"2026-07-14T02:13:00+10:00",'
    b'"observationType":"animal","scientificName":"Vulpes vulpes","count":1,"classificationProbability":0.9}'
)

SETTINGS = {
    "no persistence": "persistence false\nmax_queued_messages 0\n",
    "persistence true (save every 1800 s and at stop)": "persistence true\nmax_queued_messages 0\n",
    "persistence + autosave_on_changes 1 (deploy/mosquitto.conf)": "persistence true\nautosave_on_changes true\nautosave_interval 1\nmax_queued_messages 0\n",
    "persistence + default max_queued_messages (1000)": "persistence true\n",
}


def free_port():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    p = s.getsockname()[1]
    s.close()
    return p


class Broker:
    def __init__(self, settings, work):
        self.port = free_port()
        self.work = work
        conf = os.path.join(work, "mosquitto.conf")
        with open(conf, "w") as f:
            f.write(
                f"listener {self.port} 127.0.0.1\nallow_anonymous true\nuser root\n"
                f"persistence_location {work}/\nlog_dest none\nmax_inflight_messages 1000\n{settings}"
            )
        self.conf = conf
        self.start()

    def start(self):
        self.proc = subprocess.Popen([MOSQUITTO, "-c", self.conf], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        for _ in range(100):
            try:
                socket.create_connection(("127.0.0.1", self.port), 0.1).close()
                return
            except OSError:
                time.sleep(0.05)
        raise RuntimeError("mosquitto did not start")

    def kill9(self):
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait()

    def stop(self):
        self.proc.send_signal(signal.SIGTERM)
        self.proc.wait()


class Subscriber:
    """A persistent-session QoS 1 subscriber (what outrider holds)."""

    def __init__(self, port):
        self.got = set()
        self.lock = threading.Lock()
        self.ready = threading.Event()
        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="benchsub", clean_session=False)
        c.max_inflight_messages_set(1000)
        c.on_connect = lambda cl, u, f, rc, p: cl.subscribe("outrider/+/observation", qos=1)
        c.on_subscribe = lambda cl, u, mid, rc, p: self.ready.set()

        def on_message(cl, u, msg):
            with self.lock:
                self.got.add(msg.payload.split(b'"')[3])

        c.on_message = on_message
        c.connect("127.0.0.1", port)
        c.loop_start()
        if not self.ready.wait(10):
            raise RuntimeError("no subscription")
        self.c = c

    def count(self):
        with self.lock:
            return len(self.got)

    def close(self):
        self.c.loop_stop()
        self.c.disconnect()


def publish(port, n, start=0):
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="benchpub")
    c.max_inflight_messages_set(100)
    c.max_queued_messages_set(0)
    c.connect("127.0.0.1", port)
    c.loop_start()
    t = time.monotonic()
    infos = [c.publish(TOPIC, PAYLOAD % (start + i), qos=1) for i in range(n)]
    for i in infos:
        i.wait_for_publish(300)
    took = time.monotonic() - t
    c.loop_stop()
    c.disconnect()
    return took


def wait_count(sub, n, limit=60):
    end = time.monotonic() + limit
    last, still = -1, time.monotonic()
    while time.monotonic() < end:
        k = sub.count()
        if k >= n:
            return k
        if k != last:
            last, still = k, time.monotonic()
        elif time.monotonic() - still > 3:
            return k  # nothing more is coming
        time.sleep(0.05)
    return sub.count()


def run(name, settings, n):
    rows = []
    # online
    with tempfile.TemporaryDirectory() as w:
        b = Broker(settings, w)
        s = Subscriber(b.port)
        took = publish(b.port, n)
        k = wait_count(s, n)
        rows.append((name, "online", f"{n / took:,.0f} msg/s", f"{n - k} of {n} lost"))
        s.close()
        b.stop()
    # offline, then the subscriber returns
    with tempfile.TemporaryDirectory() as w:
        b = Broker(settings, w)
        Subscriber(b.port).close()
        took = publish(b.port, n)
        s = Subscriber(b.port)
        k = wait_count(s, n)
        rows.append((name, "offline", f"{n / took:,.0f} msg/s", f"{n - k} of {n} lost"))
        s.close()
        b.stop()
    # broker crash while the subscriber is away
    with tempfile.TemporaryDirectory() as w:
        b = Broker(settings, w)
        Subscriber(b.port).close()
        publish(b.port, n)
        time.sleep(0.2)
        b.kill9()
        b.start()
        s = Subscriber(b.port)
        k = wait_count(s, n)
        rows.append((name, "kill -9 of the broker", "", f"{n - k} of {n} lost"))
        s.close()
        b.stop()
    return rows


def main():
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 5000
    print(f"N = {n}, {os.cpu_count()} cores, {subprocess.run([MOSQUITTO, '-h'], capture_output=True, text=True).stdout.splitlines()[0]}")
    print()
    print("| setting | test | publish rate (until every PUBACK) | messages lost |")
    print("|---|---|---|---|")
    for name, settings in SETTINGS.items():
        for r in run(name, settings, n):
            print("| " + " | ".join(r) + " |", flush=True)


if __name__ == "__main__":
    main()
