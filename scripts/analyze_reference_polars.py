#!/usr/bin/env python3
"""The per-step Ah and Wh of a log with polars, for the `analyze_big`
benchmark to time side by side with `packbench analyze` and the pandas
script (scripts/analyze_reference.py).

A lazy CSV scan of the four columns used, grouped by step in file order;
each step's trapezoidal integrals of current and power over time:

    Ah = sum((I[k] + I[k-1]) / 2 * (t[k] - t[k-1])) / 3600
    Wh = sum((P[k] + P[k-1]) / 2 * (t[k] - t[k-1])) / 3600,  P = V * I

which is numpy.trapezoid's rule, written as polars expressions so the
whole query runs in polars' own engine (all cores).

Prints one JSON object: {"steps": [[step, ah, wh], ...]}.

Run: python3 scripts/analyze_reference_polars.py LOG.csv
"""
import json
import sys

import polars as pl

t = pl.col("t_s")
i = pl.col("current_a")
p = pl.col("voltage_v") * pl.col("current_a")


def trapezoid(y):
    return ((y + y.shift(1)) / 2.0 * (t - t.shift(1))).sum() / 3600.0


out = (
    pl.scan_csv(sys.argv[1])
    .select(["t_s", "step", "voltage_v", "current_a"])
    .group_by("step", maintain_order=True)
    .agg(trapezoid(i).alias("ah"), trapezoid(p).alias("wh"))
    .collect()
)
json.dump({"steps": [[int(s), float(a), float(w)] for s, a, w in out.iter_rows()]}, sys.stdout)
print()
