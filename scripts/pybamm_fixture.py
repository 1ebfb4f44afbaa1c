"""Generate tests/fixtures/pybamm_spme_chen2020.csv and its expected values.

An outside check for packbench's analysis: a published battery model from a
general-purpose library produces a log, and the library's own figures are
the expected values.

Library:        PyBaMM (pip install pybamm), version recorded in the JSON
Model:          SPMe (single particle model with electrolyte), option
                "calculate discharge energy"
Parameter set:  Chen2020 (LG M50 21700 cell, 5 Ah; Chen et al., J.
                Electrochem. Soc. 167 (2020) 080534)
Experiment:     from full: rest 1 h; C/5 discharge to 2.5 V (the capacity
                step); rest 1 h; C/2 charge to 4.2 V, hold 4.2 V to C/50;
                rest 1 h; C/5 discharge for 2.5 h (to about half charge);
                rest 2 h; 1C discharge pulse for 18 s; rest 10 min.
Log:            a foreign log: columns "Time [s]", "Voltage [V]",
                "Current [A]", "Temperature [degC]"; current positive on
                discharge (PyBaMM's sign); 10 s sampling, 0.1 s around the
                pulse.
Expected:       the library's "Discharge capacity [A.h]" and "Discharge
                energy [W.h]" over the C/5 discharge step, and its
                "Local ECM resistance [Ohm]" 0.1 s and 1 s after the pulse edge
                ((open-circuit voltage at the bulk state of charge − voltage) / current).

Run: python3 scripts/pybamm_fixture.py   (takes a minute)
"""
import csv
import json
import pathlib

import numpy as np
import pybamm

OUT = pathlib.Path(__file__).resolve().parent.parent / "tests" / "fixtures"

model = pybamm.lithium_ion.SPMe({"calculate discharge energy": "true"})
params = pybamm.ParameterValues("Chen2020")
experiment = pybamm.Experiment(
    [
        pybamm.step.string("Rest for 1 hour", period="10 seconds"),
        pybamm.step.string("Discharge at C/5 until 2.5 V", period="10 seconds"),
        pybamm.step.string("Rest for 1 hour", period="10 seconds"),
        pybamm.step.string("Charge at C/2 until 4.2 V", period="10 seconds"),
        pybamm.step.string("Hold at 4.2 V until C/50", period="10 seconds"),
        pybamm.step.string("Rest for 1 hour", period="10 seconds"),
        pybamm.step.string("Discharge at C/5 for 150 minutes", period="10 seconds"),
        pybamm.step.string("Rest for 2 hours", period="10 seconds"),
        pybamm.step.string("Discharge at 1C for 18 seconds", period="0.1 seconds"),
        pybamm.step.string("Rest for 10 minutes", period="1 second"),
    ]
)
sim = pybamm.Simulation(model, parameter_values=params, experiment=experiment)
sol = sim.solve(initial_soc=1.0)

steps = [st for cyc in sol.cycles for st in cyc.steps]
rows = []
for step in steps:
    t = step["Time [s]"].entries
    v = step["Voltage [V]"].entries
    i = step["Current [A]"].entries
    temp = step["X-averaged cell temperature [C]"].entries
    for k in range(len(t)):
        rows.append((t[k], v[k], i[k], float(temp[k])))

dis = steps[1]
cap = float(dis["Discharge capacity [A.h]"].entries[-1] - dis["Discharge capacity [A.h]"].entries[0])
energy = float(dis["Discharge energy [W.h]"].entries[-1] - dis["Discharge energy [W.h]"].entries[0])
pulse = steps[8]
tp = pulse["Time [s]"].entries
t_edge = float(tp[0])
res = pulse["Local ECM resistance [Ohm]"]
expected = {
    "library": "pybamm",
    "version": pybamm.__version__,
    "model": "SPMe",
    "parameter_set": "Chen2020",
    "capacity_step_discharge_capacity_ah": cap,
    "capacity_step_discharge_energy_wh": energy,
    "pulse_edge_time_s": t_edge,
    "resistance_ohm_at_0_1_s": float(res(t_edge + 0.1)),
    "resistance_ohm_at_1_s": float(res(t_edge + 1.0)),
    "resistance_ohm_at_10_s": float(res(t_edge + 10.0)),
}

with open(OUT / "pybamm_spme_chen2020.csv", "w", newline="") as f:
    w = csv.writer(f)
    w.writerow(["Time [s]", "Voltage [V]", "Current [A]", "Temperature [degC]"])
    for r in rows:
        w.writerow([f"{r[0]:.4f}", f"{r[1]:.6f}", f"{r[2]:.6f}", f"{r[3]:.3f}"])
(OUT / "pybamm_spme_chen2020_expected.json").write_text(json.dumps(expected, indent=2) + "\n")
print(json.dumps(expected, indent=2), len(rows), "rows")
