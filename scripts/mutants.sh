#!/usr/bin/env bash
# Mutation testing of the code that computes the figures a user acts on
# (issue 33): cargo-mutants changes one operator, constant or return value
# at a time and runs the crate's own tests; a mutant no test notices is a
# piece of arithmetic nothing checks.
#
#   scripts/mutants.sh                 every target below, in turn
#   scripts/mutants.sh import units    only these targets
#   OUT=dir JOBS=1 scripts/mutants.sh  where the results go, how many at once
#   SHARD=0/4 scripts/mutants.sh analysis   every fourth mutant (round robin)
#   ITERATE=1 scripts/mutants.sh grade      only what the last run in $OUT
#                                           did not catch (after new tests)
#   RETEST=names.txt scripts/mutants.sh grade   only the mutants named in the
#                                           file (one per line, as missed.txt
#                                           lists them): a sample's missed
#                                           ones again, after new tests
#
# Targets: import (record::import), units (model::units), verdict
# (record::verdict), analysis (the whole analysis crate), and the parts of
# analysis that carry the figures: integrate, correct, resistance, grade,
# fade (fits, history, schedule, fleet), steps (step detection, the
# streaming analyzer), uncertainty, decision, characterize (the pulse-power
# levels and the equivalent-circuit fits) and rest (analysis less all of
# those: curves, cell groups, screening, calibration, BMS).
#
# Each target's outcome is in $OUT/<target>/mutants.out (caught.txt,
# missed.txt, unviable.txt, timeout.txt); the score line printed at the end
# is caught / (caught + missed + timeout), unviable mutants (those that do
# not build) left out. Not part of CI: on two cores the whole analysis
# crate (about 3,800 mutants) takes several hours; a file takes minutes.
#
# Needs cargo-mutants (`cargo install cargo-mutants --locked`).
set -euo pipefail
cd "$(dirname "$0")/.."
OUT=${OUT:-target/mutants-out}
JOBS=${JOBS:-2}
command -v cargo-mutants >/dev/null || {
    echo "cargo-mutants is not installed: cargo install cargo-mutants --locked" >&2
    exit 2
}

# target → package and files (globs relative to the workspace)
files_of() {
    case "$1" in
        import) echo "-p packbench-record -f crates/record/src/import/*.rs" ;;
        units) echo "-p packbench-model -f crates/model/src/units.rs" ;;
        verdict) echo "-p packbench-record -f crates/record/src/verdict.rs" ;;
        analysis) echo "-p packbench-analysis" ;;
        characterize) echo "-p packbench-analysis -f crates/analysis/src/ecm.rs -f crates/analysis/src/characterize.rs" ;;
        rest) echo "-p packbench-analysis -e crates/analysis/src/ecm.rs -e crates/analysis/src/characterize.rs -e crates/analysis/src/integrate.rs -e crates/analysis/src/correct.rs -e crates/analysis/src/resistance.rs -e crates/analysis/src/pulse.rs -e crates/analysis/src/fade/* -e crates/analysis/src/fit.rs -e crates/analysis/src/stream.rs -e crates/analysis/src/lib.rs -e crates/analysis/src/uncertainty.rs -e crates/analysis/src/decision.rs" ;;
        integrate) echo "-p packbench-analysis -f crates/analysis/src/integrate.rs" ;;
        correct) echo "-p packbench-analysis -f crates/analysis/src/correct.rs" ;;
        resistance) echo "-p packbench-analysis -f crates/analysis/src/resistance.rs -f crates/analysis/src/pulse.rs" ;;
        grade) echo "-p packbench-analysis -f crates/analysis/src/fade/grade.rs" ;;
        fade) echo "-p packbench-analysis -f crates/analysis/src/fade/trend.rs -f crates/analysis/src/fade/history.rs -f crates/analysis/src/fade/schedule.rs -f crates/analysis/src/fade/fleet.rs -f crates/analysis/src/fit.rs" ;;
        steps) echo "-p packbench-analysis -f crates/analysis/src/stream.rs -f crates/analysis/src/lib.rs" ;;
        uncertainty) echo "-p packbench-analysis -f crates/analysis/src/uncertainty.rs" ;;
        decision) echo "-p packbench-analysis -f crates/analysis/src/decision.rs" ;;
        *) echo "unknown target '$1'" >&2; return 2 ;;
    esac
}

targets=("$@")
# The analysis crate in parts that together are the whole crate, each
# part scored on its own.
parts=(integrate correct resistance grade fade steps decision uncertainty characterize rest)
[ "${#targets[@]}" -gt 0 ] || targets=(import units verdict "${parts[@]}")

for t in "${targets[@]}"; do
    args=$(files_of "$t")
    dir="$OUT/$t${SHARD:+-shard-${SHARD//\//of}}"
    mkdir -p "$dir"
    echo "== $t ($args${SHARD:+, shard $SHARD}) → $dir"
    # The equivalent-circuit tests (a few seconds each: most of the
    # crate's test time) call only ecm.rs and characterize.rs: a mutant
    # elsewhere is tested without them, which can only lower its score.
    skip=()
    profile=mutants
    case "$t" in
        characterize) profile=mutants-fits ;;
    esac
    case "$t" in
        analysis | characterize) ;;
        *) skip=(--cargo-test-arg=-- --cargo-test-arg=--skip --cargo-test-arg=ecm:: \
            --cargo-test-arg=--skip --cargo-test-arg=characterize::) ;;
    esac
    # Only the named mutants (their full names, matched exactly).
    only=()
    if [ -n "${RETEST:-}" ]; then
        while IFS= read -r name; do
            [ -n "$name" ] || continue
            only+=(-F "^$(printf '%s' "$name" | sed 's/[][\\.^$*+?(){}|]/\\&/g')\$")
        done < "$RETEST"
        [ "${#only[@]}" -gt 0 ] || { echo "$RETEST names no mutant" >&2; continue; }
    fi
    # The globs are cargo-mutants' own: not expanded by the shell.
    set -f
    # shellcheck disable=SC2086
    cargo mutants $args --profile "$profile" --cargo-test-arg=--lib "${skip[@]}" "${only[@]}" -j "$JOBS" \
        --minimum-test-timeout 30 ${SHARD:+--shard "$SHARD" --sharding round-robin} ${ITERATE:+--iterate} \
        -o "$dir" || true
    set +f
done

echo
echo "target        caught  missed  timeout  unviable  score"
for t in "${targets[@]}"; do
    d="$OUT/$t${SHARD:+-shard-${SHARD//\//of}}/mutants.out"
    [ -d "$d" ] || continue
    # (grep -c prints 0 and fails when nothing matches.)
    n() { if [ -f "$d/$1.txt" ]; then grep -c . "$d/$1.txt" || true; else echo 0; fi; }
    c=$(n caught); m=$(n missed); to=$(n timeout); u=$(n unviable)
    v=$((c + m + to))
    score=$(awk -v c="$c" -v v="$v" 'BEGIN { if (v > 0) printf "%.1f %%", 100 * c / v; else print "-" }')
    printf "%-12s %7d %7d %8d %9d  %s\n" "$t" "$c" "$m" "$to" "$u" "$score"
    for p in "${parts[@]}"; do
        if [ "$p" = "$t" ]; then
            ac=$((${ac:-0} + c)); am=$((${am:-0} + m)); at=$((${at:-0} + to)); au=$((${au:-0} + u))
        fi
    done
done
if [ -n "${ac:-}" ]; then
    v=$((ac + am + at))
    printf "%-12s %7d %7d %8d %9d  %s\n" "(analysis)" "$ac" "$am" "$at" "$au" \
        "$(awk -v c="$ac" -v v="$v" 'BEGIN { if (v > 0) printf "%.1f %%", 100 * c / v }') of the parts run"
fi
