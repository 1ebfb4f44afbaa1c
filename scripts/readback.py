#!/usr/bin/env python3
"""Read packbench's exports back with pandas, polars and DuckDB and check
each step's charge (Ah) and energy (Wh) against the run's summary.json.

    python3 scripts/readback.py EXPORT_DIR RUN_DIR [RUN_DIR ...]

EXPORT_DIR holds what `packbench export RUN --format parquet` and
`--format bdf` wrote for each run. For every run and every step:

- pandas reads the BDF Parquet file and integrates current and power over
  time by the trapezoidal rule (numpy);
- polars reads the BDF CSV file and integrates with its own expressions,
  and also takes the last `Step Capacity / Ah` and `Step Energy / Wh`;
- DuckDB reads the samples Parquet file (packbench's own column names) and
  integrates in SQL with window functions, and reads the steps Parquet file.

Each must equal summary.json's `charge_ah` and `energy_wh` to 1e-9 (Ah, Wh).
Nothing is integrated across a resumed run's interruption (the dividing
line is half-way between the last sample before it and the time the run
went on, as packbench does). Exits 1 on any mismatch, printing it.
Needs: pandas, pyarrow, polars, duckdb (scripts/requirements-readback.txt).
"""

import json
import sys
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import polars as pl

TOL = 1e-9


def breaks_of(summary):
    """Run times half-way across each interruption."""
    return [
        0.5 * (r["last_sample_t_s"] + max(r["t_s"], r["last_sample_t_s"]))
        for r in summary.get("resumed", [])
    ]


def with_pandas(bdf_parquet, mids):
    df = pd.read_parquet(bdf_parquet)
    out = []
    for _, g in df.groupby("Step Count / 1", sort=True):
        t = g["Test Time / s"].to_numpy()
        i = g["Current / A"].to_numpy()
        p = g["Voltage / V"].to_numpy() * i
        dt = (t[1:] - t[:-1]) / 3600.0
        keep = np.ones(len(dt), dtype=bool)
        for m in mids:
            keep &= ~((t[:-1] < m) & (m <= t[1:]))
        ah = float(np.sum(((i[:-1] + i[1:]) * 0.5 * dt)[keep]))
        wh = float(np.sum(((p[:-1] + p[1:]) * 0.5 * dt)[keep]))
        out.append((ah, wh))
    return out


def with_polars(bdf_csv, mids):
    df = pl.read_csv(bdf_csv)
    t, i, v = pl.col("Test Time / s"), pl.col("Current / A"), pl.col("Voltage / V")
    keep = pl.lit(True)
    for m in mids:
        keep = keep & ~((t.shift(1) < m) & (t >= m))
    seg = (
        df.with_columns((i * v).alias("p"))
        .with_columns(
            (
                (i + i.shift(1)) * 0.5 * (t - t.shift(1)) / 3600.0
            ).over("Step Count / 1").alias("dq"),
            (
                (pl.col("p") + pl.col("p").shift(1)) * 0.5 * (t - t.shift(1)) / 3600.0
            ).over("Step Count / 1").alias("de"),
            keep.over("Step Count / 1").alias("keep"),
        )
        .group_by("Step Count / 1", maintain_order=True)
        .agg(
            pl.col("dq").filter(pl.col("keep")).sum().alias("ah"),
            pl.col("de").filter(pl.col("keep")).sum().alias("wh"),
            pl.col("Step Capacity / Ah").last().alias("col_ah"),
            pl.col("Step Energy / Wh").last().alias("col_wh"),
        )
        .sort("Step Count / 1")
    )
    integrated = list(zip(seg["ah"].to_list(), seg["wh"].to_list()))
    columns = list(zip(seg["col_ah"].to_list(), seg["col_wh"].to_list()))
    return integrated, columns


def with_duckdb(samples_parquet, steps_parquet, mids):
    cut = " AND ".join(f"NOT (t0 < {m!r} AND {m!r} <= t_s)" for m in mids) or "TRUE"
    q = f"""
    WITH s AS (
        SELECT *, row_number() OVER () AS n FROM read_parquet('{samples_parquet}')
    ), g AS (
        SELECT *, sum(CASE WHEN step IS DISTINCT FROM prev_step THEN 1 ELSE 0 END)
                  OVER (ORDER BY n) AS seg
        FROM (SELECT *, lag(step) OVER (ORDER BY n) AS prev_step FROM s)
    ), d AS (
        SELECT seg, t_s,
               lag(t_s) OVER w AS t0,
               lag(current_a) OVER w AS i0, current_a AS i1,
               lag(voltage_v * current_a) OVER w AS p0, voltage_v * current_a AS p1
        FROM g WINDOW w AS (PARTITION BY seg ORDER BY n)
    )
    SELECT seg,
           coalesce(sum(CASE WHEN t0 IS NOT NULL AND {cut}
                        THEN (i0 + i1) * 0.5 * ((t_s - t0) / 3600.0) END), 0) AS ah,
           coalesce(sum(CASE WHEN t0 IS NOT NULL AND {cut}
                        THEN (p0 + p1) * 0.5 * ((t_s - t0) / 3600.0) END), 0) AS wh
    FROM d GROUP BY seg ORDER BY seg
    """
    integrated = [(float(a), float(w)) for _, a, w in duckdb.sql(q).fetchall()]
    steps = duckdb.sql(
        f"SELECT charge_ah, energy_wh FROM read_parquet('{steps_parquet}')"
    ).fetchall()
    return integrated, [(float(a), float(w)) for a, w in steps]


def compare(label, got, want, errors):
    if len(got) != len(want):
        errors.append(f"{label}: {len(got)} steps, summary.json has {len(want)}")
        return 0.0
    worst = 0.0
    for k, ((ga, gw), (wa, ww)) in enumerate(zip(got, want), start=1):
        d = max(abs(ga - wa), abs(gw - ww))
        worst = max(worst, d)
        if d > TOL:
            errors.append(
                f"{label}: step {k}: {ga!r} Ah {gw!r} Wh, summary.json {wa!r} Ah {ww!r} Wh"
            )
    return worst


def main(argv):
    if len(argv) < 3:
        print(__doc__)
        return 2
    out = Path(argv[1])
    errors = []
    for run in map(Path, argv[2:]):
        summary = json.loads((run / "summary.json").read_text())
        base = f"{summary['pack_id']}__{summary['run_id']}"
        want = [(s["charge_ah"], s["energy_wh"]) for s in summary["steps"]]
        mids = breaks_of(summary)
        pd_got = with_pandas(out / f"{base}.bdf.parquet", mids)
        pl_got, pl_cols = with_polars(out / f"{base}.bdf.csv", mids)
        dk_got, dk_steps = with_duckdb(
            out / f"{base}.samples.parquet", out / f"{base}.steps.parquet", mids
        )
        worst = max(
            compare(f"{base} pandas, BDF Parquet", pd_got, want, errors),
            compare(f"{base} polars, BDF CSV", pl_got, want, errors),
            compare(f"{base} polars, BDF step columns", pl_cols, want, errors),
            compare(f"{base} DuckDB, samples Parquet", dk_got, want, errors),
            compare(f"{base} DuckDB, steps Parquet", dk_steps, want, errors),
        )
        print(f"{base}: {len(want)} steps, largest difference {worst:.3g} (Ah or Wh)")
    for e in errors:
        print("MISMATCH", e)
    return 1 if errors else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
