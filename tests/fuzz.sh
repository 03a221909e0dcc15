#!/usr/bin/env bash
# Coverage-guided fuzzing of the spec reader and the CSV reader (libFuzzer through
# cargo-fuzz), each for a bounded time. Needs a nightly toolchain and cargo-fuzz
# (`cargo install cargo-fuzz`); not part of CI, whose machines have the stable toolchain
# only. Results go in docs/reliability.md; every crash found becomes a regression test.
#
#   bash tests/fuzz.sh [SECONDS_PER_TARGET]      (default 600)
set -euo pipefail
cd "$(dirname "$0")/.."
seconds="${1:-600}"
work="target/fuzz-corpus"
for target in spec_reader csv_reader; do
  mkdir -p "$work/$target"
  cp -n fuzz/seeds/"$target"/* "$work/$target"/ 2> /dev/null || true
  echo "== $target for $seconds s"
  cargo +nightly fuzz run --fuzz-dir fuzz "$target" "$work/$target" -- \
    -max_total_time="$seconds" -print_final_stats=1 -max_len=4096 2>&1 \
    | grep -E "^(stat::|Done|==[0-9]+== ERROR|SUMMARY|artifact_prefix|Test unit written)" || true
  if compgen -G "fuzz/artifacts/$target/*" > /dev/null; then
    ls fuzz/artifacts/"$target"
    echo "crashes above: turn each into a regression test"
  else
    echo "no crash"
  fi
done
