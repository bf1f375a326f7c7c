#!/usr/bin/env bash
# Runs each fuzz target for a few seconds (FUZZ_SECONDS, default 10) from the seed corpus.
# Uses the default toolchain with `-s none` (no sanitizer: libFuzzer's coverage needs no
# nightly feature then; Rust's own checks still turn memory errors into panics), so it runs
# on stable Rust, and builds without optimisation (`--dev`: about 2 minutes on 2 cores against
# 4.5 with -O; a smoke run checks that the targets build and run, long runs use -O). Skips cleanly (exit 0) where cargo-fuzz is missing or the toolchain cannot
# build libFuzzer. New corpus entries go to a temporary folder, so the committed seeds stay
# as they are.
set -euo pipefail
cd "$(dirname "$0")/.."
seconds="${FUZZ_SECONDS:-10}"
if ! cargo fuzz --version >/dev/null 2>&1; then
    echo "fuzz smoke skipped: cargo-fuzz is not installed (cargo install cargo-fuzz)"
    exit 0
fi
work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT
targets=(csv_table config_text dates_numbers text_codes scored_pairs id_pairs)
# A toolchain that cannot build libFuzzer (no C++ compiler, say) is a skip, not a failure;
# the build log says which.
if ! cargo fuzz build -s none --dev >"$work/build.log" 2>&1; then
    if grep -q "^error\[E" "$work/build.log"; then
        cat "$work/build.log" >&2
        exit 1
    fi
    echo "fuzz smoke skipped: the fuzz targets do not build with this toolchain:"
    tail -5 "$work/build.log"
    exit 0
fi
for t in "${targets[@]}"; do
    mkdir -p "$work/corpus/$t" "$work/artifacts/$t"
    echo "== $t (${seconds} s)"
    RAYON_NUM_THREADS=1 cargo fuzz run -s none --dev "$t" "$work/corpus/$t" "fuzz/corpus/$t" -- \
        -max_total_time="$seconds" \
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
