#!/usr/bin/env bash
# The fault tests of tests/faults.rs, longer and repeated: more
# observations, more kills, several rounds with fresh seeds. Not run by CI
# (tests/run-all.sh runs the short variant); figures go to
# docs/reliability.md with the command that produced them.
#
#   tests/soak.sh [ROUNDS]                       (default 3)
#
# Knobs (environment), with the soak defaults:
#   OUTRIDER_FAULT_OBSERVATIONS=50000   observations in the kill -9 test
#   OUTRIDER_FAULT_KILLS=100            kills of outrider during that load
#   OUTRIDER_FAULT_RATE=200             publish rate (messages/s) meanwhile
#   OUTRIDER_FAULT_BROKER_OBSERVATIONS=20000   load while Mosquitto restarts
#   OUTRIDER_FAULT_SEED=...             repeat one round exactly
#   SOAK_FILTER=faults::                which tests (cargo test filter)
#
# The kill test publishes for OBSERVATIONS / RATE seconds and spreads the
# kills over that time; a restart takes about 0.5 s here, so keep KILLS
# below OBSERVATIONS / RATE (it checks that every kill fell during the
# load). Each round prints the tests'
# figures (stored at each kill, duplicates, repeated deliveries) and the
# seed; a failing round stops the soak and names its seed.
set -euo pipefail
cd "$(dirname "$0")/.."
rounds=${1:-3}
export OUTRIDER_FAULT_OBSERVATIONS=${OUTRIDER_FAULT_OBSERVATIONS:-50000}
export OUTRIDER_FAULT_KILLS=${OUTRIDER_FAULT_KILLS:-100}
export OUTRIDER_FAULT_RATE=${OUTRIDER_FAULT_RATE:-200}
export OUTRIDER_FAULT_BROKER_OBSERVATIONS=${OUTRIDER_FAULT_BROKER_OBSERVATIONS:-20000}
export OUTRIDER_TEST_PYTHON=${OUTRIDER_TEST_PYTHON:-$PWD/target/py/bin/python}
filter=${SOAK_FILTER:-faults::}
[ -x "$OUTRIDER_TEST_PYTHON" ] || { echo "no test Python: run tests/run-all.sh once" >&2; exit 1; }
cargo test --test integration --no-run -q
log=$(mktemp -d)/soak.log
echo "soak: $rounds round(s), $OUTRIDER_FAULT_OBSERVATIONS observations, $OUTRIDER_FAULT_KILLS kills at $OUTRIDER_FAULT_RATE msg/s; log in $log"
start=$(date +%s)
for r in $(seq "$rounds"); do
  t0=$(date +%s)
  if ! cargo test -q --test integration "$filter" -- --test-threads=1 --nocapture >>"$log" 2>&1; then
    echo "round $r FAILED; its seed and failure:" >&2
    grep -E "OUTRIDER_FAULT_SEED|panicked|FAILED" "$log" | tail -20 >&2
    exit 1
  fi
  echo "round $r passed in $(( $(date +%s) - t0 )) s"
done
echo
echo "figures:"
grep -E "OUTRIDER_FAULT_SEED|kills in|duplicates ignored|deliveries:|stored at each broker restart|SIGTERM with|disk filled|SKIPPED" "$log" | sed 's/^/  /'
echo "soak passed: $rounds round(s) in $(( $(date +%s) - start )) s"
