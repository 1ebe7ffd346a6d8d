#!/usr/bin/env bash
# Builds the checkpoint readers with clang, AddressSanitizer and UBSan, runs the reader
# tests under them, then each libFuzzer target for a bounded time from small seed files.
# Usage: run.sh SOURCE_DIR WORK_DIR [SECONDS_PER_FUZZER]
set -euo pipefail
src=$1
work=$2
secs=${3:-20}
if ! command -v clang++ >/dev/null 2>&1; then
  echo "fuzz: clang++ is missing (tools/scripts/install-deps.sh installs it)" >&2
  exit 1
fi
mkdir -p "$work"
cmake -S "$src" -B "$work/build" -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo -DCMAKE_CXX_COMPILER=clang++ \
  -DLOBIT_IO_ONLY=ON -DLOBIT_SANITIZE=ON >"$work/configure.log" 2>&1 || { cat "$work/configure.log"; exit 1; }
cmake --build "$work/build" -j "$(nproc)" >"$work/build.log" 2>&1 || { tail -50 "$work/build.log"; exit 1; }
export ASAN_OPTIONS=detect_leaks=1:abort_on_error=1
export UBSAN_OPTIONS=print_stacktrace=1:halt_on_error=1
status=0
for t in "$work"/build/tests/fuzz/io_*_test_sanitized; do
  [ -x "$t" ] || continue
  echo "== $(basename "$t")"
  "$t" --no-intro=true 2>&1 | tail -3 || status=1
done
seeds="$work/seeds"
rm -rf "$seeds"
python3 "$src/tests/fuzz/make_seeds.py" "$seeds"
for f in "$work"/build/tests/fuzz/*_fuzz; do
  [ -x "$f" ] || continue
  name=$(basename "$f" _fuzz)
  corpus="$work/corpus-$name"
  mkdir -p "$corpus"
  cp -n "$seeds/$name"/* "$corpus"/ 2>/dev/null || true
  echo "== fuzz $name for ${secs}s"
  if ! (cd "$work" && "$f" -max_total_time="$secs" -max_len=65536 -rss_limit_mb=1024 -print_final_stats=1 \
        "$corpus" >"$work/fuzz-$name.log" 2>&1); then
    tail -40 "$work/fuzz-$name.log"
    status=1
  fi
  grep -E "stat::number_of_executed_units|stat::peak_rss_mb" "$work/fuzz-$name.log" | tr '\n' ' '
  echo
done
if [ $status -eq 0 ]; then echo "fuzz: 0 failed"; else echo "fuzz: FAILED"; fi
exit $status
