#!/usr/bin/env bash
# Run every fuzz target for a given time each (default 600 s), one after
# another, on the committed corpora; findings go to fuzz/artifacts/<target>/
# and the full output to fuzz/logs/<target>.log. Afterwards, shrink a grown
# corpus before committing it: cargo +nightly fuzz cmin -O TARGET fuzz/corpus/TARGET
# Needs the nightly toolchain and cargo-fuzz (cargo install cargo-fuzz).
#   bash scripts/fuzz.sh [SECONDS] [TARGET...]
set -euo pipefail
cd "$(dirname "$0")/.."
secs="${1:-600}"
shift || true
targets=("$@")
if [ ${#targets[@]} -eq 0 ]; then
    targets=(procedure bench_file profile quantity scpi_reply sim_command csv_log)
fi
mkdir -p fuzz/logs
for t in "${targets[@]}"; do
    echo "== $t for ${secs}s"
    # -timeout: any single input taking over 10 s counts as a hang.
    cargo +nightly fuzz run -O "$t" "fuzz/corpus/$t" -- \
        -max_total_time="$secs" -timeout=10 -rss_limit_mb=2048 -print_final_stats=1 \
        2>&1 | tee "fuzz/logs/$t.log" | grep -E "^#[0-9]+[[:space:]]+DONE|^Done|^stat::|ERROR|panicked" || true
done
