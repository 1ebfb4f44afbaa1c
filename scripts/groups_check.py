#!/usr/bin/env python3
"""Check packbench's per-group charge to cutoff with NumPy and SciPy.

Reads one run folder (groups.csv, samples.csv, summary.json) and works out
each group's charge to its cutoff again, independently of packbench's code:
the discharged charge by numpy's trapezoid over the pack current, each
group's voltage curve laid on the cutoff group's with
scipy.optimize.brute then Nelder-Mead (V_k(Q) = V_w(q + r*Q) + o, np.interp
for the reference curve, o the mean residual; the first 30 minutes of the discharge left out, as
packbench does), and the cutoff group's curve carried on along its last
slope where the cutoff less o lies below its last reading. Prints each
group and exits 1 if any differs from summary.json by more than the
tolerance (default 0.3 %).

Usage: python3 scripts/groups_check.py RUN_DIR [TOLERANCE_PCT]
"""

import csv
import json
import sys

import numpy as np
from scipy.optimize import brute, minimize

SKIP_S = 1800.0


def read_csv(path):
    with open(path, newline="") as f:
        rows = list(csv.reader(f))
    return rows[0], rows[1:]


def main():
    run = sys.argv[1]
    tol = float(sys.argv[2]) if len(sys.argv) > 2 else 0.3
    summary = json.load(open(f"{run}/summary.json"))
    groups = summary["groups"]
    step = groups["step"]
    head, rows = read_csv(f"{run}/samples.csv")
    ti, si, ii = head.index("t_s"), head.index("step"), head.index("current_a")
    pack = np.array(
        [(float(r[ti]), float(r[ii])) for r in rows if int(r[si]) == step]
    )
    t, i = pack[:, 0], pack[:, 1]
    # Discharged charge at each sample, Ah (positive).
    q = np.concatenate(
        [[0.0], np.cumsum(-0.5 * (i[1:] + i[:-1]) * np.diff(t) / 3600.0)]
    )
    q_at = dict(zip(t.round(3), q))
    gh, grows = read_csv(f"{run}/groups.csv")
    n = sum(1 for h in gh if h.startswith("group_"))
    g = [r for r in grows if int(r[1]) == step]
    gt = np.array([float(r[0]) for r in g])
    gq = np.array([q_at[round(x, 3)] for x in gt])
    gv = np.array([[float(r[3 + k]) for k in range(n)] for r in g])
    w = int(np.argmin(gv[-1]))
    cutoff = gv[-1, w]
    ref_q, ref_v = gq, gv[:, w]
    q_end = ref_q[-1]
    # The slope of the last half per cent of the reference.
    tail = ref_q >= q_end - 0.005 * q_end
    j = int(np.argmax(tail))
    j = min(j, len(ref_q) - 2)
    slope = (ref_v[-1] - ref_v[j]) / (ref_q[-1] - ref_q[j])
    keep = gt - gt[0] >= SKIP_S
    worst = 0.0
    ok = True
    for k in range(n):
        got = groups["groups"][k]["charge_to_cutoff_ah"]
        if k == w:
            mine = q_end
        else:
            x, v = gq[keep], gv[keep, k]

            def spread(p):
                # With q and r set, the best o is the mean residual: the
                # variance of the residuals is what is left.
                qq, r = p
                at = qq + r * x
                # Past its end the reference goes on along its last slope.
                ref = np.where(
                    at <= q_end,
                    np.interp(at, ref_q, ref_v),
                    ref_v[-1] + slope * (at - q_end),
                )
                return float(np.var(v - ref))

            # A grid over (q, r), then Nelder-Mead from its best point.
            start = brute(
                spread, ((-0.2 * q_end, 0.5 * q_end), (0.7, 1.3)), Ns=41, finish=None
            )
            fit = minimize(
                spread,
                start,
                method="Nelder-Mead",
                options={"xatol": 1e-7, "fatol": 1e-14, "maxiter": 4000},
            )
            qq, r = fit.x
            o = float(np.mean(v - np.interp(qq + r * x, ref_q, ref_v)))
            level = cutoff - o
            if level < ref_v[-1]:
                xs = q_end + (level - ref_v[-1]) / slope
            else:
                # The last crossing of the level, from the end.
                idx = np.where((ref_v[:-1] >= level) & (ref_v[1:] <= level))[0][-1]
                va, vb = ref_v[idx], ref_v[idx + 1]
                f = (va - level) / (va - vb) if va > vb else 0.0
                xs = ref_q[idx] + f * (ref_q[idx + 1] - ref_q[idx])
            mine = (xs - qq) / r
        dev = abs(got / mine - 1.0) * 100.0
        worst = max(worst, dev)
        ok &= dev <= tol
        print(f"group {k + 1:>2}: packbench {got:.4f} Ah, numpy/scipy {mine:.4f} Ah, {dev:.3f} %")
    print(f"largest difference {worst:.3f} % (tolerance {tol} %)")
    sys.exit(0 if ok else 1)


if __name__ == "__main__":
    main()
