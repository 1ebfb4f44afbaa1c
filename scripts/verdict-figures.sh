#!/bin/bash
# The figures of the verdict's findings (one verdict per run), on the
# simulated bench and the example log. From the repository root:
#   cargo build && bash scripts/verdict-figures.sh [BIN]
B=${1:-target/debug/packbench}
A="--columns time=elapsed_min,voltage=pack_volts,current=amps_out --current-sign discharge-positive --time-unit min"
R="--chemistry li-ion --series 10 --rated 14Ah"
T=$(mktemp -d)
echo "== 1. a decimal comma in one row"
python3 - "$T" <<'PY'
import sys
lines=open('examples/other-bench.csv').read().split('\n')
k=[i for i,l in enumerate(lines) if l.startswith('450.0000,')][0]
lines[k]=lines[k].replace('450.0000','450,0000',1)
open(sys.argv[1]+'/comma.csv','w').write('\n'.join(lines))
PY
$B analyze $T/comma.csv $A $R > $T/o 2>&1; echo "exit $?"; grep -E "error|Measured|State of health|Grade:" $T/o
$B analyze $T/comma.csv $A $R --skip-bad-rows 2>&1 | grep -E "Measured|State of health|Grade:|left out"
echo "== 2. not from a full charge"
cat > $T/partial.toml <<'TOML'
title = "partial"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1C"
temperature_max = "55degC"
[sampling]
every = "1s"
[[phase]]
name = "measure"
  [[phase.step]]
  kind = "discharge"
  current = "0.2C"
  ends = ["voltage < 3.0V/cell", "time > 7h"]
  result = "capacity"
TOML
$B run $T/partial.toml --sim --pack FR-P1 --results $T/res --quiet
$B run $T/partial.toml --sim --pack FR-P1 --results $T/res 2>&1 | grep -E "State of health|Grade:|New nominal"
$B index $T/res >/dev/null; python3 -c "
import sqlite3,sys; c=sqlite3.connect('$T/res/index.sqlite'); print('index soh_pct:', c.execute('select soh_pct, grade, counts_for_history from runs').fetchall())"
echo "== 3. the same pack at 0.2C and 0.5C, then with its own Peukert exponent"
python3 - "$T" <<'PY'
import sys
s=open('procedures/capacity-check.toml').read()
i=s.rindex('current = "0.2C"')
open(sys.argv[1]+'/fast.toml','w').write(s[:i]+'current = "0.5C"'+s[i+len('current = "0.2C"'):])
PY
$B run procedures/capacity-check.toml --sim --pack FR-F1 --results $T/res --quiet
$B run $T/fast.toml --sim --pack FR-F1 --results $T/res --quiet
D=($(ls -d $T/res/FR-F1/*/))
$B peukert ${D[0]} ${D[1]} --save
$B analyze ${D[1]} | grep -E "Capacity \(corrected\)|State of health"
echo "== 2b. a rating far under the log's capacity"
$B analyze examples/other-bench.csv $A --chemistry li-ion --series 10 --rated 2Ah 2>&1 | grep -E "State of health|more than a pack"
echo "== 4. new nominal from a foreign log"
$B analyze examples/other-bench.csv $A $R --bms-capacity 13Ah 2>&1 | grep -E "New nominal|cutoff|Capacity \(corrected\)"
$B analyze examples/other-bench.csv $A $R --cutoff 3.0V/cell 2>&1 | grep -E "New nominal"
echo "== 5. an import far above the pack's history"
mkdir -p $T/res/FR-L04; printf 'chemistry = "li-ion"\nseries = 10\nrated_capacity = "14Ah"\n' > $T/res/FR-L04/pack.toml
printf 'date,cycles,capacity_ah\n2025-01-01,100,12.6\n2025-06-01,300,11.8\n2026-01-01,500,10.92\n' > $T/res/FR-L04/history.csv
$B import examples/other-bench.csv --pack FR-L04 --date 2026-06-01 --results $T/res $A
$B fleet $T/res --today 2026-07-01 | grep -E "FR-L04"
echo "== 8. exit codes"
$B fleet $T/nope >/dev/null 2>&1; echo "fleet no folder: exit $? (exists: $(test -e $T/nope && echo yes || echo no))"
echo "== 9. a semicolon log with decimal commas; the pulse resistance"
sed 's/,/;/g; s/\./,/g' examples/other-bench.csv > $T/semi.csv
$B analyze $T/semi.csv $A $R | grep -E "Measured"
$B analyze examples/other-bench.csv $A | grep -E "dQ/dV|Pulse resistance" | head -3
rm -rf $T
