#!/usr/bin/env python3
"""The per-step Ah and Wh of a log with pandas and numpy, for the
`analyze_big` benchmark to time side by side with `packbench analyze`.

Reads the CSV with pandas.read_csv, and integrates current and power over
time for each step with numpy's trapezoidal rule:

    Ah = numpy.trapezoid(I, t) / 3600,   Wh = numpy.trapezoid(V * I, t) / 3600

Prints one JSON object: {"steps": [[step, ah, wh], ...]}.

Run: python3 scripts/analyze_reference.py LOG.csv
"""
import json
import sys

import numpy as np
import pandas as pd

df = pd.read_csv(sys.argv[1], usecols=["t_s", "step", "voltage_v", "current_a"])
out = []
for step, g in df.groupby("step", sort=False):
    t = g["t_s"].to_numpy()
    v = g["voltage_v"].to_numpy()
    i = g["current_a"].to_numpy()
    out.append([int(step), float(np.trapezoid(i, t) / 3600.0), float(np.trapezoid(v * i, t) / 3600.0)])
json.dump({"steps": out}, sys.stdout)
print()
