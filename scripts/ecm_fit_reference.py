"""Cross-check of packbench's equivalent-circuit fit with scipy.optimize.

Reads the PyBaMM pulse-power fixture (tests/fixtures/pybamm_thevenin_hppc.csv,
made by scripts/pybamm_hppc_fixture.py) and fits, level by level, the same
first-order Thevenin model packbench fits (R0, R1, tau1, the OCV's slope
against charge in the pulse window, the relaxation's settled voltage) with
scipy.optimize.least_squares (trust-region reflective, bounds on tau, three
starts), on every row of the level's window (packbench thins them).

Windows, as packbench reads them: a level opens at a discharge edge after
a rest of 10 min or more; the pulse window runs from the last row before
it to the end of the charge pulse (OCV = OCV_before + k*q); the rows after
it drive the RC pair only, except the last rest before the next level,
whose voltages count with a settled voltage V_inf. Current zero-order held
from each row to the next; exact update of the pair.

Usage: python3 scripts/ecm_fit_reference.py FIXTURE.csv PACKBENCH_ECM1.csv
Prints each level's fit; exits 1 when packbench's R0, R1 or C1 differs from
scipy's by more than TOL (0.5 %), or either differs from the model's own
parameters (in the expected JSON beside the fixture) by more than 2 %.

numpy 2.4.6, scipy 1.17.1 (scripts/requirements-readback.txt).
"""
import csv
import json
import pathlib
import sys

import numpy as np
from scipy.optimize import least_squares

TOL = 0.005
TRUTH_TOL = 0.02

fixture = pathlib.Path(sys.argv[1])
rows = np.loadtxt(fixture, delimiter=",", skiprows=1)
t, v, i = rows[:, 0], rows[:, 1], -rows[:, 2]  # charge positive, as packbench
expected = json.loads(fixture.with_name(fixture.stem + "_expected.json").read_text())
thr = 0.01 * expected["capacity_ah"]

cls = np.where(i > thr, 1, np.where(i < -thr, -1, 0))
# Segments: (class, first row, last row).
segs = []
s0 = 0
for k in range(1, len(t) + 1):
    if k == len(t) or cls[k] != cls[s0]:
        segs.append((cls[s0], s0, k - 1))
        s0 = k
# Levels: a discharge segment of at most 180 s after a rest of 10 min or more.
opens = []
for n in range(1, len(segs)):
    c, a, b = segs[n]
    pc, pa, pb = segs[n - 1]
    if c == -1 and pc == 0 and t[pb] - t[pa] >= 600 and t[b] - t[pb] <= 180:
        opens.append(n)

def window(n, n_next):
    """Rows and roles (0 pulse, 1 drive, 2 relaxation) of the level."""
    first = segs[n - 1][2]
    last = segs[n_next - 1][2] if n_next is not None else len(t) - 1
    roles = np.ones(last - first + 1, dtype=int)
    # Pulse window: discharge, the rest after it, the charge pulse.
    m = n
    end = segs[n][2]
    if m + 1 < len(segs) and segs[m + 1][0] == 0 and t[segs[m + 1][2]] - t[segs[m + 1][1]] <= 300:
        m += 1
        end = segs[m][2]
        if m + 1 < len(segs) and segs[m + 1][0] == 1:
            m += 1
            end = segs[m][2]
    roles[: end - first + 1] = 0
    # The last rest before the next level counts as the relaxation.
    stop = n_next - 1 if n_next is not None else len(segs) - 1
    c, a, b = segs[stop]
    if c == 0 and a > end:
        roles[a - first : b - first + 1] = 2
    # Two rests in a row (different sampling) are one.
    while stop - 1 > m and segs[stop - 1][0] == 0:
        stop -= 1
        c, a, b = segs[stop]
        roles[a - first : b - first + 1] = 2
    return first, last, roles

def model(p, tt, ii, q, roles, ocv0):
    r0, r1, logtau, k, vinf = p
    tau = np.exp(logtau)
    u = np.zeros_like(tt)
    for j in range(1, len(tt)):
        a = np.exp(-(tt[j] - tt[j - 1]) / tau)
        u[j] = u[j - 1] * a + ii[j - 1] * (1 - a)
    pulse = ocv0 + k * q + ii * r0 + r1 * u
    relax = vinf + r1 * u
    return np.where(roles == 2, relax, pulse)

fits = []
for idx, n in enumerate(opens):
    n_next = opens[idx + 1] if idx + 1 < len(opens) else None
    first, last, roles = window(n, n_next)
    tt, vv, ii = t[first : last + 1], v[first : last + 1], i[first : last + 1]
    q = np.concatenate([[0], np.cumsum(0.5 * (ii[1:] + ii[:-1]) * np.diff(tt) / 3600)])
    use = roles != 1
    if not (roles == 2).any():
        continue
    best = None
    for tau0 in (5.0, 30.0, 200.0):
        p0 = [0.01, 0.01, np.log(tau0), 0.0, vv[-1]]
        r = least_squares(
            lambda p: (model(p, tt, ii, q, roles, vv[0]) - vv)[use],
            p0,
            bounds=([0, 0, np.log(0.1), -10, 0], [1, 1, np.log(20000), 10, 10]),
            x_scale=[0.01, 0.01, 1.0, 0.1, 1.0],
            xtol=1e-12,
            ftol=1e-12,
            gtol=1e-12,
        )
        if best is None or r.cost < best.cost:
            best = r
    r0, r1, logtau, _, _ = best.x
    tau = np.exp(logtau)
    fits.append((r0, r1, tau / r1, tau))
    print(f"level {idx + 1}: R0 {r0 * 1e3:.4f} mOhm, R1 {r1 * 1e3:.4f} mOhm, C1 {tau / r1:.1f} F, tau1 {tau:.3f} s")

ours = []
with open(sys.argv[2]) as f:
    for row in csv.DictReader(f):
        if row["r1_ohm"]:
            ours.append((float(row["soc_pct"]), float(row["r0_ohm"]), float(row["r1_ohm"]), float(row["c1_f"])))
ours.sort(key=lambda x: -x[0])  # levels from full down, as found
bad = 0
truth = (expected["r0_ohm"], expected["r1_ohm"], expected["c1_f"])
for k, (f, o) in enumerate(zip(fits, ours)):
    for name, a, b, tr in zip(("R0", "R1", "C1"), f[:3], o[1:], truth):
        d = abs(b / a - 1)
        dt_s = abs(a / tr - 1)
        dt_p = abs(b / tr - 1)
        ok = d <= TOL and dt_s <= TRUTH_TOL and dt_p <= TRUTH_TOL
        if not ok:
            bad += 1
        print(f"  level {k + 1} {name}: scipy {a:.6g}, packbench {b:.6g} ({d * 100:.3f} %), model {tr:.6g}{'' if ok else '  <-- out of tolerance'}")
if len(fits) != len(ours):
    print(f"scipy found {len(fits)} fitted levels, packbench {len(ours)}")
    bad += 1
sys.exit(1 if bad else 0)
