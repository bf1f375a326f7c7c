#!/usr/bin/env bash
# Matching benchmarks (issue 3): the solver on generated instances (time and peak memory, one
# process per case), then `dovetail match` against scipy on the same files.
# Usage: bash benches/matching.sh      (the scipy part needs: pip install numpy scipy)
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --quiet
cargo bench --quiet --bench matching -- all
if python3 -c "import scipy" 2>/dev/null; then
  python3 benches/scipy_compare.py target/release/dovetail
else
  echo "scipy not installed: skipping the scipy comparison (pip install numpy scipy)"
fi
