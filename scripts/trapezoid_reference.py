#!/usr/bin/env python3
"""Reference values for the per-step Ah and Wh integration test.

Writes tests/fixtures/trapezoid_log.csv (a synthetic sample log in
packbench's samples.csv format: irregular sampling, a CC-CV-like charge, a
rest, a discharge with a falling voltage and a pulse with sign changes) and
tests/fixtures/trapezoid_expected.json with each step's charge (Ah) and
energy (Wh) computed by numpy's trapezoidal rule:

    Ah = numpy.trapezoid(I, t) / 3600,   Wh = numpy.trapezoid(V * I, t) / 3600

The log is generated from a fixed pseudo-random sequence, so re-running the
script reproduces both files. Run: python3 scripts/trapezoid_reference.py
"""
import json
import math
import os

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
FIX = os.path.join(HERE, "..", "tests", "fixtures")

state = 12345


def rnd():
    """A small linear congruential generator, so the fixture is stable."""
    global state
    state = (1103515245 * state + 12345) % (2**31)
    return state / 2**31


rows = []
t = 0.0
# step 1: charge, CC 5 A then exponential taper, V rising to 42 V
for k in range(900):
    v = 36.0 + 6.0 * (1 - math.exp(-k / 300.0))
    i = 5.0 if k < 500 else 5.0 * math.exp(-(k - 500) / 120.0)
    rows.append((t, 1, 1, v, i))
    t += 0.5 + rnd() * 1.5
# step 2: rest
for k in range(120):
    rows.append((t, 2, 1, 41.2 - 0.001 * k, 0.0))
    t += 1.0 + rnd()
# step 3: discharge, CC -2.8 A, voltage falling non-linearly
for k in range(1500):
    v = 41.0 - 8.0 * (k / 1500.0) ** 2 - 0.3 * math.sin(k / 50.0)
    rows.append((t, 3, 1, v, -2.8 + 0.01 * math.sin(k / 7.0)))
    t += 0.8 + rnd() * 0.4
# step 4: pulse with sign changes
for k in range(300):
    i = 3.0 * math.sin(k / 20.0)
    rows.append((t, 4, 2, 37.0 + 0.05 * i, i))
    t += 0.2 + rnd() * 0.3

with open(os.path.join(FIX, "trapezoid_log.csv"), "w") as f:
    f.write("t_s,step,cycle,voltage_v,current_a,temperature_c\n")
    for (t, s, c, v, i) in rows:
        f.write(f"{t:.3f},{s},{c},{v:.6f},{i:.6f},25.00\n")

# Read the values back exactly as written (the test reads the file).
data = np.genfromtxt(os.path.join(FIX, "trapezoid_log.csv"), delimiter=",", skip_header=1)
expected = []
for step in sorted(set(int(s) for s in data[:, 1])):
    d = data[data[:, 1] == step]
    t, v, i = d[:, 0], d[:, 3], d[:, 4]
    expected.append({
        "step": step,
        "charge_ah": float(np.trapezoid(i, t) / 3600.0),
        "energy_wh": float(np.trapezoid(v * i, t) / 3600.0),
        "duration_s": float(t[-1] - t[0]),
    })
with open(os.path.join(FIX, "trapezoid_expected.json"), "w") as f:
    json.dump({"source": "numpy.trapezoid " + np.__version__, "steps": expected}, f, indent=2)
    f.write("\n")
print(json.dumps(expected, indent=2))
