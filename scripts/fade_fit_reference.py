#!/usr/bin/env python3
"""Reference values for the fade fit: straight-line least squares and its
95 % prediction interval, computed by general-purpose libraries.

Writes tests/fixtures/fade_fit_points.csv (an invented history: state of
health against equivalent full cycles, with scatter) and
tests/fixtures/fade_fit_expected.json with:

- slope and intercept from numpy.polyfit(x, y, 1) and
  scipy.stats.linregress(x, y) (slope, intercept, rvalue**2, stderr);
- the 95 % prediction interval for a new observation at several x0 from
  statsmodels OLS(...).get_prediction(x0).summary_frame(alpha=0.05)
  (obs_ci_lower / obs_ci_upper), i.e. the textbook formula
  y0 +/- t(0.975, n-2) * s * sqrt(1 + 1/n + (x0 - xbar)^2 / Sxx);
- the Student-t quantile from scipy.stats.t.ppf(0.975, n-2).

Run: python3 scripts/fade_fit_reference.py
"""
import json
import os

import numpy as np
import scipy
import scipy.stats
import statsmodels
import statsmodels.api as sm

HERE = os.path.dirname(os.path.abspath(__file__))
FIX = os.path.join(HERE, "..", "tests", "fixtures")

x = np.array([0, 62, 118, 190, 244, 301, 377, 430, 488, 555, 610, 672], dtype=float)
# A 0.021 %/cycle fade with a fixed scatter pattern (invented).
scatter = np.array([0.31, -0.22, 0.05, 0.40, -0.35, -0.10, 0.27, -0.41, 0.12, 0.08, -0.19, 0.23])
y = 100.2 - 0.021 * x + scatter

with open(os.path.join(FIX, "fade_fit_points.csv"), "w") as f:
    f.write("cycles,soh_pct\n")
    for a, b in zip(x, y):
        f.write(f"{a:.1f},{b:.6f}\n")

data = np.genfromtxt(os.path.join(FIX, "fade_fit_points.csv"), delimiter=",", skip_header=1)
x, y = data[:, 0], data[:, 1]
pf = np.polyfit(x, y, 1)
lr = scipy.stats.linregress(x, y)
X = sm.add_constant(x)
ols = sm.OLS(y, X).fit()
x0s = [0.0, 336.0, 800.0, 1000.0]
frame = ols.get_prediction(sm.add_constant(np.array(x0s), has_constant="add")).summary_frame(alpha=0.05)
expected = {
    "sources": {
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "statsmodels": statsmodels.__version__,
    },
    "polyfit": {"slope": float(pf[0]), "intercept": float(pf[1])},
    "linregress": {
        "slope": float(lr.slope),
        "intercept": float(lr.intercept),
        "r_squared": float(lr.rvalue ** 2),
        "slope_stderr": float(lr.stderr),
    },
    "t_975": float(scipy.stats.t.ppf(0.975, len(x) - 2)),
    "prediction": [
        {"x0": x0, "mean": float(m), "lower": float(lo), "upper": float(hi)}
        for x0, m, lo, hi in zip(x0s, frame["mean"], frame["obs_ci_lower"], frame["obs_ci_upper"])
    ],
}
with open(os.path.join(FIX, "fade_fit_expected.json"), "w") as f:
    json.dump(expected, f, indent=2)
    f.write("\n")
print(json.dumps(expected, indent=2))
