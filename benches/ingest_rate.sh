#!/usr/bin/env bash
# Measures how fast outrider drains a QoS 1 backlog from Mosquitto
# (persistence on, no queue limit), with the whole ingest path: decode,
# de-duplicate, commit to SQLite (synchronous=FULL), acknowledge.
#
#   benches/ingest_rate.sh [N]      (default N = 50000)
#
# 1. start Mosquitto on a free port, and outrider once so its persistent
#    session and subscriptions exist; stop outrider;
# 2. publish N observations with paho-mqtt (queued at the broker);
# 3. start outrider and time until `status` shows N stored.
set -euo pipefail
cd "$(dirname "$0")/.."
N=${1:-50000}
export RUST_LOG=${RUST_LOG:-info}
PY=${OUTRIDER_TEST_PYTHON:-target/py/bin/python}
cargo build --release -q
BIN=target/release/outrider
work=$(mktemp -d)
trap 'kill $(jobs -p) 2>/dev/null || true; rm -rf "$work"' EXIT
port=$($PY -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')
mkdir -p "$work/mq"
cat > "$work/mq/mosquitto.conf" <<CONF
listener $port 127.0.0.1
allow_anonymous true
persistence true
persistence_location $work/mq/
user root
log_dest file $work/mq/mosquitto.log
log_type all
max_queued_messages 0
max_inflight_messages 1000
CONF
/usr/sbin/mosquitto -c "$work/mq/mosquitto.conf" >/dev/null 2>&1 &
sleep 0.5
cp tests/reference/../../config_examples/sites.csv "$work/sites.csv"
cat > "$work/outrider.toml" <<CONF
[service]
state_dir = "state"
timezone = "Australia/Sydney"
[mqtt]
url = "mqtt://127.0.0.1:$port"
client_id = "outriderbench"
[sites]
file = "sites.csv"
CONF
$BIN run -c "$work/outrider.toml" 2>"$work/log1" &
pid=$!
for _ in $(seq 100); do grep -q "Connected to the MQTT broker" "$work/log1" && break; sleep 0.1; done
kill -TERM $pid; wait $pid || true
$PY - "$port" "$N" <<'PYEOF'
import json, sys, time, datetime
import paho.mqtt.client as mqtt
port, n = int(sys.argv[1]), int(sys.argv[2])
c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="benchpub")
c.max_inflight_messages_set(1000); c.max_queued_messages_set(0)
c.connect("127.0.0.1", port); c.loop_start()
base = datetime.datetime.now(datetime.timezone.utc) - datetime.timedelta(days=20)
infos = []
for i in range(n):
    dep = "KB-%02d" % (1 + i % 16)
    t = (base + datetime.timedelta(seconds=i * 30)).isoformat()
    p = {"observationID": "b-%d" % i, "deploymentID": dep, "eventStart": t, "observationType": "animal",
         "scientificName": "Vulpes vulpes", "count": 1, "classificationProbability": 0.9}
    infos.append(c.publish("outrider/%s/observation" % dep, json.dumps(p), qos=1))
for i in infos: i.wait_for_publish()
c.loop_stop(); c.disconnect()
PYEOF
start=$(date +%s.%N)
$BIN run -c "$work/outrider.toml" 2>"$work/log2" &
pid=$!
while :; do
  s=$($BIN status -c "$work/outrider.toml" --json | $PY -c 'import json,sys; print(json.load(sys.stdin)["observations_stored"])')
  [ "$s" -ge "$N" ] && break
  sleep 0.2
done
end=$(date +%s.%N)
kill -TERM $pid; wait $pid || true
$PY -c "n=$N; t=$end-$start; print(f'{n} QoS 1 observations drained in {t:.2f} s: {n/t:,.0f} messages/s ({__import__(\"os\").cpu_count()} cores)')"
