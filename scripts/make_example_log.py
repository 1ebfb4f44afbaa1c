#!/usr/bin/env python3
"""Write examples/other-bench.csv: a log "from another bench" for the
README's `packbench analyze` example, in a column layout of our own
invention (elapsed_min, pack_volts, amps_out with discharge positive).

The data are packbench's own simulated bench (invented, for the demo
only): a 10S 14 Ah li-ion e-bike pack of the fictional rental fleet run
through procedures/capacity-check.toml, a row every 10 s (time in
minutes).

    cargo build --release
    python3 scripts/make_example_log.py
"""
import csv
import glob
import os
import subprocess
import tempfile

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def main():
    with tempfile.TemporaryDirectory() as tmp:
        subprocess.run(
            [os.path.join(ROOT, "target/release/packbench"), "run",
             os.path.join(ROOT, "procedures/capacity-check.toml"),
             "--sim", "--pack", "DEPOT-B-07", "--chemistry", "li-ion",
             "--series", "10", "--rated", "14Ah", "--results", tmp, "--quiet",
             "--test-date", "2026-11-30"],
            check=True)
        log = glob.glob(os.path.join(tmp, "DEPOT-B-07", "*", "samples.csv"))[0]
        out = os.path.join(ROOT, "examples", "other-bench.csv")
        next_t = 0.0
        with open(log) as f, open(out, "w", newline="") as g:
            w = csv.writer(g, lineterminator="\n")
            w.writerow(["elapsed_min", "pack_volts", "amps_out"])
            for row in csv.DictReader(f):
                t = float(row["t_s"])
                if t + 1e-9 < next_t:
                    continue
                next_t = t + 10.0
                w.writerow([f"{t / 60.0:.4f}", f"{float(row['voltage_v']):.3f}",
                            f"{-float(row['current_a']):.3f}"])
    print(out)


if __name__ == "__main__":
    main()
