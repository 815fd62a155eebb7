#!/usr/bin/env bash
# Runs each fuzz target for SECONDS and prints one summary line per target
# and runner. Outside CI (docs/reliability.md "Fuzzing").
#
#   fuzz/run.sh SECONDS [TARGET...]      targets: decode config geojson sites
#
# Runners (FUZZ_RUNNER=libfuzzer|stable|both, default both):
# - libfuzzer: cargo-fuzz with libFuzzer, coverage-guided. With
#   AddressSanitizer (the default) cargo-fuzz passes -Zsanitizer=address,
#   which the stable compiler refuses unless RUSTC_BOOTSTRAP=1; if that
#   build fails, `-s none` (no sanitizer, stable flags only) is used.
#   FUZZ_SANITIZER=none skips straight to it. Needs `cargo install
#   cargo-fuzz` and a C++ compiler (libfuzzer-sys builds libFuzzer). The
#   corpus it grows is kept in fuzz/corpus/<target>/ (not committed);
#   crashes go to fuzz/artifacts/<target>/.
# - stable: src/bin/stable.rs, random mutation of the seeds without
#   coverage feedback; builds on any toolchain.
# A crash makes the exit status 1.
set -uo pipefail
cd "$(dirname "$0")"
secs=${1:?usage: fuzz/run.sh SECONDS [TARGET...]}
shift
targets=("$@")
[ ${#targets[@]} -gt 0 ] || targets=(decode config geojson sites)
runner=${FUZZ_RUNNER:-both}
status=0

seed_dirs() {
  case "$1" in
    decode) echo "seeds/decode" ;;
    config) echo "seeds/config ../config_examples" ;;
    geojson) echo "seeds/geojson ../config_examples/areas" ;;
    sites) echo "seeds/sites ../config_examples" ;;
  esac
}

if [ "$runner" = libfuzzer ] || [ "$runner" = both ]; then
  san=()
  label="libFuzzer+ASan (cargo-fuzz, RUSTC_BOOTSTRAP=1)"
  built=no
  if ! command -v cargo-fuzz >/dev/null 2>&1; then
    echo "cargo-fuzz is not installed (cargo install cargo-fuzz); skipping libFuzzer" >&2
  else
    if [ "${FUZZ_SANITIZER:-address}" = address ] \
       && RUSTC_BOOTSTRAP=1 cargo fuzz build >/tmp/outrider-fuzz-build.log 2>&1; then
      built=yes
    else
      san=(-s none)
      label="libFuzzer, no sanitizer (cargo-fuzz -s none)"
      if cargo fuzz build -s none >/tmp/outrider-fuzz-build.log 2>&1; then
        built=yes
      else
        echo "cargo fuzz build failed (see /tmp/outrider-fuzz-build.log); skipping libFuzzer" >&2
      fi
    fi
  fi
  if [ "$built" = yes ]; then
    # The sanitizer build needs the nightly flags let through; -s none does not.
    [ ${#san[@]} -gt 0 ] || export RUSTC_BOOTSTRAP=1
    for t in "${targets[@]}"; do
      mkdir -p "corpus/$t" "artifacts/$t"
      log="artifacts/$t/libfuzzer.log"
      # shellcheck disable=SC2046
      cargo fuzz run "${san[@]}" "$t" "corpus/$t" $(seed_dirs "$t") -- \
        -max_total_time="$secs" -max_len=72000 -print_final_stats=1 >"$log" 2>&1
      rc=$?
      # "#963574	DONE   cov: 4356 ft: 10143 corp: 2228/184Kb ..." (tab after the count)
      done_line=$(grep -E '^#[0-9]+[[:space:]]+DONE' "$log" | tail -1 | tr -s '\t ' ' ')
      execs=$(grep -E '^stat::number_of_executed_units:' "$log" | awk '{print $2}')
      crash=$(ls "artifacts/$t" | grep -E '^(crash|oom|timeout|leak)-' | head -1)
      printf '{"target":"%s","runner":"%s","seconds":%s,"execs":%s,"final":"%s","corpus_files":%s,"exit":%s,"artifact":"%s"}\n' \
        "$t" "$label" "$secs" "${execs:-0}" "${done_line}" "$(ls "corpus/$t" | wc -l)" "$rc" "${crash}"
      [ "$rc" = 0 ] || status=1
    done
  fi
fi

if [ "$runner" = stable ] || [ "$runner" = both ]; then
  cargo build --release --no-default-features --bin stable-fuzz -q || exit 2
  for t in "${targets[@]}"; do
    ./target/release/stable-fuzz "$t" "$secs" || status=1
  done
fi
exit $status
