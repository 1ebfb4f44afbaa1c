#!/usr/bin/env python3
"""Reference values for the smoothing and peak finding of dQ/dV curves.

Writes tests/fixtures/curves_reference.json: a synthetic incremental-capacity
curve (three Gaussian peaks on a baseline plus pseudo-random noise, from a
fixed linear congruential generator, so re-running reproduces it), its
Gaussian smoothing by scipy.ndimage.gaussian_filter1d(sigma=2,
mode="nearest", truncate=4.0), and the peaks scipy.signal.find_peaks finds
in the smoothed curve with a prominence of at least 5 % of its maximum,
with their prominences.

Run: python3 scripts/curves_reference.py
"""
import json
import math
import os

import numpy as np
import scipy
from scipy.ndimage import gaussian_filter1d
from scipy.signal import find_peaks

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "..", "tests", "fixtures", "curves_reference.json")

state = 2024


def rnd():
    global state
    state = (1103515245 * state + 12345) % (2**31)
    return state / 2**31 - 0.5


y = []
for k in range(240):
    v = 3.0 + k * 0.005
    val = 2.0
    val += 30.0 * math.exp(-((v - 3.45) / 0.03) ** 2)
    val += 12.0 * math.exp(-((v - 3.70) / 0.05) ** 2)
    val += 20.0 * math.exp(-((v - 3.95) / 0.02) ** 2)
    y.append(round(val + 1.5 * rnd(), 6))

ys = gaussian_filter1d(np.array(y), sigma=2.0, mode="nearest", truncate=4.0)
peaks, props = find_peaks(ys, prominence=0.05 * ys.max())
out = {
    "source": f"scipy {scipy.__version__}: ndimage.gaussian_filter1d(sigma=2, mode='nearest', truncate=4.0); signal.find_peaks(prominence=0.05*max)",
    "y": y,
    "smoothed": [float(x) for x in ys],
    "peaks": [int(p) for p in peaks],
    "prominences": [float(p) for p in props["prominences"]],
}
with open(OUT, "w") as f:
    json.dump(out, f, indent=1)
    f.write("\n")
print(out["peaks"], out["prominences"])
