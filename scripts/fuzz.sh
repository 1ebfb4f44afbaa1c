#!/usr/bin/env bash
# Run every fuzz target for a given time each (default 600 s), one after
# another. Each target starts from its small seed corpus (fuzz/seeds/T/)
# and its minimised corpus (fuzz/corpus/T.tar.gz, unpacked under
# fuzz/work/T/); findings go to fuzz/artifacts/T/ and the full output to
# fuzz/logs/T.log. Afterwards the grown corpus is minimised again and
# packed back into fuzz/corpus/T.tar.gz (commit that one file). A crash
# found here becomes a file in fuzz/regressions/T/, which `cargo test`
# replays for ever after (tests/it/fuzz_seeds.rs).
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
mkdir -p fuzz/logs fuzz/work
for t in "${targets[@]}"; do
    echo "== $t for ${secs}s"
    rm -rf "fuzz/work/$t" "fuzz/work/$t.min"
    tar -xzf "fuzz/corpus/$t.tar.gz" -C fuzz/work
    cp fuzz/seeds/"$t"/* "fuzz/work/$t/"
    # -timeout: any single input taking over 10 s counts as a hang.
    cargo +nightly fuzz run -O "$t" "fuzz/work/$t" -- \
        -max_total_time="$secs" -timeout=10 -rss_limit_mb=2048 -print_final_stats=1 \
        2>&1 | tee "fuzz/logs/$t.log" | grep -E "^#[0-9]+[[:space:]]+DONE|^Done|^stat::|ERROR|panicked" || true
    mkdir -p "fuzz/work/$t.min"
    cargo +nightly fuzz cmin -O "$t" "fuzz/work/$t" -- "fuzz/work/$t.min" >/dev/null 2>&1 \
        || cp "fuzz/work/$t"/* "fuzz/work/$t.min/"
    rm -rf "fuzz/work/$t" && mv "fuzz/work/$t.min" "fuzz/work/$t"
    (cd fuzz/work && tar -czf "../corpus/$t.tar.gz" --sort=name --owner=0 --group=0 \
        --numeric-owner --mtime='2026-01-01' "$t")
    echo "$t: $(ls "fuzz/work/$t" | wc -l) inputs packed into fuzz/corpus/$t.tar.gz"
done
