#!/usr/bin/env python3
"""Outside check of the quick grade's regression: ordinary least squares
with statsmodels on a committed fixture of calibration pairs
(tests/fixtures/quick_grade_pairs.csv: screening features and the capacity
a full test measured, from packs of one simulated family), and its 95 %
prediction interval for a new pack (statsmodels' get_prediction and
summary_frame: mean, obs_ci_lower, obs_ci_upper).

Writes tests/fixtures/quick_grade_expected.json, which the analysis crate's
test compares with packbench's own fit to 6 significant figures.

Run: python3 scripts/quick_grade_reference.py   (pip install statsmodels)
"""
import csv
import json
import pathlib

import numpy as np
import statsmodels
import statsmodels.api as sm

FIX = pathlib.Path(__file__).resolve().parent.parent / "tests" / "fixtures"
rows = list(csv.DictReader(open(FIX / "quick_grade_pairs.csv")))
features = ["window_ah_per_v", "r_full_mohm"]
X = sm.add_constant(np.array([[float(r[f]) for f in features] for r in rows]))
y = np.array([float(r["capacity_ah"]) for r in rows])
fit = sm.OLS(y, X).fit()
# A new pack between the family's packs (chosen for the check).
x0 = [9.1, 55.0]
frame = fit.get_prediction(np.array([[1.0] + x0])).summary_frame(alpha=0.05)
out = {
    "library": "statsmodels",
    "version": statsmodels.__version__,
    "features": features,
    "coefficients": [float(b) for b in fit.params],
    "residual_sd": float(np.sqrt(fit.scale)),
    "x0": x0,
    "mean": float(frame["mean"].iloc[0]),
    "obs_ci_lower": float(frame["obs_ci_lower"].iloc[0]),
    "obs_ci_upper": float(frame["obs_ci_upper"].iloc[0]),
}
(FIX / "quick_grade_expected.json").write_text(json.dumps(out, indent=2) + "\n")
print(json.dumps(out, indent=2))
