#!/usr/bin/env bash
# Coverage-guided fuzzing of every reader of untrusted input (libFuzzer through
# cargo-fuzz), each for a bounded time: the spec reader, the CSV reader, the saved-model
# reader, the cache-entry reader and predict's new rows. Needs a nightly toolchain and
# cargo-fuzz (`cargo install cargo-fuzz`); not part of CI, whose machines have the stable
# toolchain only. Results go in docs/reliability.md; every crash found becomes a
# regression test.
#
#   bash tests/fuzz.sh [SECONDS_PER_TARGET] [TARGET...]      (default 600, all targets)
set -euo pipefail
cd "$(dirname "$0")/.."
seconds="${1:-600}"
shift || true
targets=("$@")
if [ ${#targets[@]} -eq 0 ]; then
  targets=(spec_reader csv_reader saved_model cache_entry predict)
fi
work="target/fuzz-corpus"
cargo +nightly fuzz build --fuzz-dir fuzz -O
for target in "${targets[@]}"; do
  mkdir -p "$work/$target"
  cp -n fuzz/seeds/"$target"/* "$work/$target"/ 2> /dev/null || true
  echo "== $target for $seconds s"
  cargo +nightly fuzz run --fuzz-dir fuzz -O "$target" "$work/$target" -- \
    -max_total_time="$seconds" -print_final_stats=1 -max_len=16384 -timeout=10 -rss_limit_mb=2048 2>&1 \
    | grep -E "^(stat::number_of_executed_units|stat::peak_rss_mb|Done|==[0-9]+== ERROR|SUMMARY|Test unit written|ALARM)" || true
  if compgen -G "fuzz/artifacts/$target/*" > /dev/null; then
    ls fuzz/artifacts/"$target"
    echo "crashes above: turn each into a regression test"
  else
    echo "no crash"
  fi
done
