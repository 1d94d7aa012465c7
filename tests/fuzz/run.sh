#!/usr/bin/env bash
# Runs every fuzz target for a bounded time (default 60 s each; FUZZ_SECONDS
# overrides), starting from the committed seed corpus in tests/fuzz/corpus/.
# New interesting inputs go to a scratch corpus (tests/fuzz/artifacts/ keeps
# crashes); add the ones worth keeping to corpus/ by hand.
# Needs a nightly toolchain and cargo-fuzz (cargo install cargo-fuzz).
set -euo pipefail
cd "$(dirname "$0")/../.."
seconds="${FUZZ_SECONDS:-60}"
targets=(ingest_csv ingest_json electrodes_csv sequence_csv model_json config_toml)
if [ "$#" -gt 0 ]; then targets=("$@"); fi
scratch="$(mktemp -d)"
trap 'rm -rf "$scratch"' EXIT
for t in "${targets[@]}"; do
    mkdir -p "$scratch/$t"
    echo "== $t: ${seconds} s"
    cargo +nightly fuzz run -O --fuzz-dir tests/fuzz "$t" "$scratch/$t" "tests/fuzz/corpus/$t" -- \
        -max_total_time="$seconds" -max_len=65536 -timeout=10 -rss_limit_mb=2048
done
echo "all ${#targets[@]} targets ran ${seconds} s each without a crash"
