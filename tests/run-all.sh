#!/usr/bin/env bash
# The test command. Installs what the tests need when it can (Mosquitto,
# Chromium and chromium-driver from Debian's packages; a Python virtual
# environment with paho-mqtt, Selenium and the reference libraries pinned
# in tests/reference/requirements.txt), checks
# that the committed reference data still regenerates byte for byte, then
# runs every Rust test.
#
# Usage: tests/run-all.sh [extra cargo test arguments]
set -euo pipefail
cd "$(dirname "$0")/.."

say() { printf '\n== %s\n' "$*"; }

# 1. System packages.
missing=()
[ -x /usr/sbin/mosquitto ] || command -v mosquitto >/dev/null 2>&1 || missing+=(mosquitto)
command -v mosquitto_pub >/dev/null 2>&1 || missing+=(mosquitto-clients)
if ! python3 -c 'import venv, ensurepip' >/dev/null 2>&1; then missing+=(python3-venv); fi
# xmllint checks CAP 1.2 alerts against the XSD (tests/interchange.rs).
command -v xmllint >/dev/null 2>&1 || missing+=(libxml2-utils)
# systemd-analyze, systemd-sysusers, systemd-tmpfiles check deploy/ (tests/deploy.rs).
command -v systemd-analyze >/dev/null 2>&1 || missing+=(systemd)
# A real browser for the status page (tests/web.rs): Debian's Chromium and
# its WebDriver, driven by Selenium from the Python environment below.
command -v chromium >/dev/null 2>&1 || missing+=(chromium)
command -v chromedriver >/dev/null 2>&1 || missing+=(chromium-driver)
if [ ${#missing[@]} -gt 0 ]; then
  say "installing ${missing[*]}"
  if [ "$(id -u)" = 0 ]; then
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${missing[@]}" >/dev/null
  elif command -v sudo >/dev/null 2>&1; then
    sudo apt-get update -qq
    sudo DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${missing[@]}" >/dev/null
  else
    echo "please install: ${missing[*]} (Debian: apt-get install ${missing[*]})" >&2
    exit 1
  fi
fi

# 2. The Python test environment, rebuilt when the requirements change.
venv=target/py
req=tests/reference/requirements.txt
stamp="$venv/.requirements.sha256"
want=$(sha256sum "$req" | cut -d' ' -f1)
if [ ! -x "$venv/bin/python" ] || [ "$(cat "$stamp" 2>/dev/null)" != "$want" ]; then
  say "making the Python test environment in $venv"
  rm -rf "$venv"
  python3 -m venv "$venv"
  "$venv/bin/pip" install -q --disable-pip-version-check -r "$req"
  echo "$want" > "$stamp"
fi

# 3. Reference data: regenerate and compare with what is committed.
say "regenerating reference data"
snap=$(mktemp -d)
trap 'rm -rf "$snap"' EXIT
cp -a tests/reference/data/. "$snap/"
for gen in tests/reference/gen_*.py; do
  "$venv/bin/python" "$gen"
done
if ! diff -r -q "$snap" tests/reference/data; then
  echo "reference data differs from what the generators produce now (see above);" >&2
  echo "the committed files were restored; rerun a generator by hand to inspect" >&2
  rm -rf tests/reference/data && mkdir -p tests/reference/data && cp -a "$snap/." tests/reference/data/
  exit 1
fi
echo "reference data regenerates identically"

# 4. The Rust tests: unit, property, reference and integration.
say "cargo test"
export OUTRIDER_TEST_PYTHON="$PWD/$venv/bin/python"
# Benches are left out: they are measurements (docs/performance.md), and
# in test mode their set-up alone takes minutes.
cargo test --lib --bins --tests "$@"
