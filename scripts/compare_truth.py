#!/usr/bin/env python3
"""Compare measured per-step charge and energy with the simulation truth.

For every run folder under RESULTS (default ./results) that ran on the
simulated bench, print each charge and discharge step's measured Ah and Wh
(summary.json) beside the simulator's own integral (run.json,
simulation.steps) and the relative difference.

    cargo run --release -- run procedures/capacity-check.toml --sim --pack IDEAL --sim-ideal --results /tmp/acc
    cargo run --release -- run procedures/capacity-check.toml --sim --pack NOISY --results /tmp/acc
    python3 scripts/compare_truth.py /tmp/acc
"""
import glob
import json
import os
import sys

root = sys.argv[1] if len(sys.argv) > 1 else "results"
for run in sorted(glob.glob(os.path.join(root, "*", "*", "run.json"))):
    d = os.path.dirname(run)
    r = json.load(open(run))
    if not r.get("simulation"):
        continue
    s = json.load(open(os.path.join(d, "summary.json")))
    truth = {t["step"]: t for t in r["simulation"]["steps"]}
    ideal = r["simulation"]["config"]["ideal"]
    print(f"{r['pack_id']}/{r['run_id']} ({'ideal' if ideal else 'default'} instruments)")
    for st in s["steps"]:
        t = truth.get(st["step"])
        if t is None or st["kind"] not in ("charge", "discharge") or t["charge_ah"] == 0:
            continue
        dah = (st["charge_ah"] / t["charge_ah"] - 1) * 100
        dwh = (st["energy_wh"] / t["energy_wh"] - 1) * 100
        print(f"  step {st['step']} {st['kind']:9}  {st['charge_ah']:10.5f} Ah vs {t['charge_ah']:10.5f} ({dah:+.4f} %)"
              f"   {st['energy_wh']:10.3f} Wh vs {t['energy_wh']:10.3f} ({dwh:+.4f} %)")
