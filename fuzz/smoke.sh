#!/usr/bin/env bash
# Runs each fuzz target for a few seconds (FUZZ_SECONDS, default 10) from the seed corpus.
# Skips cleanly (exit 0) where nightly Rust or cargo-fuzz is missing. New corpus entries go
# to a temporary folder, so the committed seeds stay as they are.
set -euo pipefail
cd "$(dirname "$0")/.."
seconds="${FUZZ_SECONDS:-10}"
if ! cargo +nightly --version >/dev/null 2>&1 || ! cargo +nightly fuzz --version >/dev/null 2>&1; then
    echo "skipped: no nightly/cargo-fuzz"
    exit 0
fi
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
targets=(csv_table config_text dates_numbers text_codes scored_pairs id_pairs)
cargo +nightly fuzz build -O
for t in "${targets[@]}"; do
    mkdir -p "$work/corpus/$t" "$work/artifacts/$t"
    echo "== $t (${seconds} s)"
    RAYON_NUM_THREADS=1 cargo +nightly fuzz run -O "$t" "$work/corpus/$t" "fuzz/corpus/$t" -- \
        -max_total_time="$seconds" -jobs=1 -workers=1 \
        -artifact_prefix="$work/artifacts/$t/" -print_final_stats=1 2>&1 |
        grep -E '^(stat::number_of_executed_units|==[0-9]+==|SUMMARY|thread .* panicked)' || true
    if compgen -G "$work/artifacts/$t/*" >/dev/null; then
        echo "fuzz target $t crashed; inputs:" >&2
        ls "$work/artifacts/$t" >&2
        mkdir -p fuzz/artifacts/$t && cp "$work/artifacts/$t"/* fuzz/artifacts/$t/
        exit 1
    fi
done
echo "fuzz smoke: all targets ran without a crash"
