#!/usr/bin/env bash
# The honesty matrix of issue 16: 17 synth scenarios (the full-field demo at three noise
# levels; few fields; movers, alone and with their households; one name; relatives of left
# people in the right table; no names; duplicates inside a table; few true pairs; a birth date
# blank in half the right rows) x seeds, each printing what the tool reported beside the
# truth. Usage: bash benches/honesty.sh [seeds] [rows] [name filter]
# (defaults: "1 2", 20000, every scenario). About 3.5 minutes on 2 cores (each run is
# also linked with the truth's own laws).
set -euo pipefail
cd "$(dirname "$0")/.."
cargo bench --quiet --bench honesty -- "${1:-1 2}" "${2:-20000}" "${3:-}"
