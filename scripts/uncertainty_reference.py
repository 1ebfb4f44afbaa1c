#!/usr/bin/env python3
"""Outside check of packbench's capacity uncertainty budget.

Reads a JSON file written by the integration test `uncertainty::…`: the
inputs of a capacity budget (the charge, the run's duration, the samples'
figures, the stated accuracy) and the budget packbench computed. Works the
budget out again, independently:

1. first-order GUM propagation (JCGM 100:2008) with the `uncertainties`
   package (3.2.3): the measurement model of shared/reference/metrology.md
   §1.1, Q_m = (1 + g + eps)·Q + o·T + noise + resolution + rule + end + cut,
   each input a ufloat with its own standard uncertainty;
2. a Monte Carlo of the same model per JCGM 101:2008 with numpy (1e6
   trials, the 2.5 % and 97.5 % points).

Checks, per case: the combined standard uncertainty agrees with packbench's
within 1e-6 (relative); the 95 % half-width agrees with packbench's Monte
Carlo within 1.5 % where a rectangular term dominates, and with k·u = 1.96·u
within 1.5 % where the model is near normal; and, where a rectangular term
dominates, the Monte Carlo half-width is at least 5 % under k = 2's (the
case JCGM 101 exists for). Prints the figures; exits 1 on a mismatch.

    python3 scripts/uncertainty_reference.py budget_cases.json
"""
import json
import math
import sys

import numpy as np
from uncertainties import ufloat

SQ3 = math.sqrt(3.0)


def inputs_of(c):
    """Each input's standard uncertainty (in Ah) and its distribution."""
    q, t = c["q_ah"], c["duration_s"]
    gain = c["current_reading_pct"] / 100.0
    terms = {}
    terms["current gain"] = (q * gain / SQ3, "rect")
    if c["tare_readings"]:
        s, d, n = c["noise_a"], c["current_resolution"], c["tare_readings"]
        terms["current offset"] = (math.sqrt(s * s / n + d * d / 12.0) * t / 3600.0, "normal")
    else:
        terms["current offset"] = (c["current_offset"] / SQ3 * t / 3600.0, "rect")
    d, s = c["current_resolution"], c["noise_a"]
    if d > 0:
        if s < d:
            terms["resolution"] = (0.5 * d * t / 3600.0 / SQ3, "rect")
        else:
            terms["resolution"] = (d / math.sqrt(12.0) * math.sqrt(c["sum_dt2_s2"]) / 3600.0, "normal")
    terms["noise (Type A)"] = (s * math.sqrt(c["sum_dt2_s2"]) / 3600.0, "normal")
    if c["timebase_ppm"]:
        terms["time base"] = (q * c["timebase_ppm"] * 1e-6 / SQ3, "rect")
    terms["integration rule"] = (c["integration_ah"] / SQ3, "rect")
    terms["end detection"] = (0.5 * c["end_current_a"] * c["last_dt_s"] / 3600.0 / SQ3, "rect")
    a_v = c["voltage_reading_pct"] / 100.0 * c["cutoff_v"] + c["voltage_offset"]
    terms["cutoff voltage"] = (a_v / c["dv_dq_v_per_ah"] / SQ3, "rect")
    return {k: v for k, v in terms.items() if v[0] > 0}


def check(c, rng):
    terms = inputs_of(c)
    # 1. GUM with the uncertainties package: each input a ufloat about 0.
    q = ufloat(c["q_ah"], 0.0)
    y = q
    for name, (u, _) in terms.items():
        y = y + ufloat(0.0, u, name)
    u_gum = y.std_dev
    # 2. JCGM 101 Monte Carlo with numpy.
    m = 1_000_000
    draw = np.full(m, c["q_ah"])
    for name, (u, shape) in terms.items():
        if shape == "rect":
            draw += rng.uniform(-SQ3 * u, SQ3 * u, m)
        else:
            draw += rng.normal(0.0, u, m)
    lo, hi = np.percentile(draw, [2.5, 97.5])
    half = 0.5 * (hi - lo)
    dominant = max(terms.items(), key=lambda kv: kv[1][0])
    rect_dominates = dominant[1][1] == "rect" and dominant[1][0] ** 2 > 0.5 * u_gum**2
    ok = True
    rel = abs(u_gum / c["packbench_u"] - 1.0)
    print(f"{c['name']}: u = {u_gum * 1e3:.4f} mAh (uncertainties) vs {c['packbench_u'] * 1e3:.4f} (packbench), rel {rel:.1e}")
    ok &= rel < 1e-6
    pb_half = c["packbench_half_width"]
    print(f"  95 % half-width: numpy Monte Carlo {half * 1e3:.4f} mAh, packbench {pb_half * 1e3:.4f}, k = 2: {2 * u_gum * 1e3:.4f}; dominant {dominant[0]} ({'rectangular' if rect_dominates else 'not rectangular-dominated'})")
    if rect_dominates:
        ok &= abs(half / pb_half - 1.0) < 0.015
        ok &= half < 0.95 * 2.0 * u_gum
        print(f"  k = 2 overstates the Monte Carlo interval by {(2 * u_gum / half - 1) * 100:.1f} %")
    else:
        ok &= abs(half / (1.96 * u_gum) - 1.0) < 0.015
        print(f"  near normal: Monte Carlo / (1.96 u) = {half / (1.96 * u_gum):.4f}")
    return ok


def main():
    cases = json.load(open(sys.argv[1]))
    rng = np.random.default_rng(20261204)
    ok = all([check(c, rng) for c in cases])
    if not ok:
        print("MISMATCH")
        sys.exit(1)
    print("all cases agree")


if __name__ == "__main__":
    main()
