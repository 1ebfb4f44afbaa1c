"""Generate the two-level resistance fixtures (IEC 61960 pulse) and their
expected value, from a published battery model in a general-purpose
library: an outside check of packbench's two-level resistance on a log
from elsewhere.

Library:        PyBaMM (pip install pybamm), version recorded in the JSON
Model:          SPMe (single particle model with electrolyte)
Parameter set:  Chen2020 (LG M50 21700 cell, 5 Ah nominal, so It = 5 A;
                Chen et al., J. Electrochem. Soc. 167 (2020) 080534)
Experiment:     from full: rest 10 min; C/5 discharge for 150 min (to about
                half charge); rest 1 h; the IEC 61960 two-level pulse:
                0.2 It (1 A) for 10 s, directly followed by 1 It (5 A) for
                1 s; rest 10 min. 10 s sampling, 0.1 s over the pulse, 1 s
                in the rest after it.
Logs:           tests/fixtures/pybamm_two_level_steps.csv with a "Step"
                column (one number per experiment step, so the two levels
                are separate steps), and tests/fixtures/pybamm_two_level.csv
                with no step column at all. Columns "Time [s]",
                "Voltage [V]", "Current [A]"; current positive on discharge
                (PyBaMM's sign).
Expected:       R = (U1 - U2) / (I2 - I1), U1 and I1 the model's voltage and
                current at the last point of the 0.2 It level, U2 and I2 at
                the last point of the 1 It level (the exact level ends).

Run: python3 scripts/pybamm_two_level_fixture.py   (about a minute)
"""
import csv
import json
import pathlib

import pybamm

OUT = pathlib.Path(__file__).resolve().parent.parent / "tests" / "fixtures"

model = pybamm.lithium_ion.SPMe()
params = pybamm.ParameterValues("Chen2020")
experiment = pybamm.Experiment(
    [
        pybamm.step.string("Rest for 10 minutes", period="10 seconds"),
        pybamm.step.string("Discharge at C/5 for 150 minutes", period="10 seconds"),
        pybamm.step.string("Rest for 1 hour", period="10 seconds"),
        pybamm.step.string("Discharge at 1 A for 10 seconds", period="0.1 seconds"),
        pybamm.step.string("Discharge at 5 A for 1 second", period="0.1 seconds"),
        pybamm.step.string("Rest for 10 minutes", period="1 second"),
    ]
)
sim = pybamm.Simulation(model, parameter_values=params, experiment=experiment)
sol = sim.solve(initial_soc=1.0)

steps = [st for cyc in sol.cycles for st in cyc.steps]
rows = []
for n, step in enumerate(steps, start=1):
    t = step["Time [s]"].entries
    v = step["Voltage [V]"].entries
    i = step["Current [A]"].entries
    for k in range(len(t)):
        rows.append((n, float(t[k]), float(v[k]), float(i[k])))

low, high = steps[3], steps[4]
u1 = float(low["Voltage [V]"].entries[-1])
i1 = float(low["Current [A]"].entries[-1])
u2 = float(high["Voltage [V]"].entries[-1])
i2 = float(high["Current [A]"].entries[-1])
expected = {
    "library": "pybamm",
    "version": pybamm.__version__,
    "model": "SPMe",
    "parameter_set": "Chen2020",
    "level_1": {"t_end_s": float(low["Time [s]"].entries[-1]), "u_v": u1, "i_a": i1},
    "level_2": {"t_end_s": float(high["Time [s]"].entries[-1]), "u_v": u2, "i_a": i2},
    "two_level_resistance_ohm": (u1 - u2) / (i2 - i1),
}


def write(name, with_step):
    with open(OUT / name, "w", newline="") as f:
        w = csv.writer(f)
        w.writerow((["Step"] if with_step else []) + ["Time [s]", "Voltage [V]", "Current [A]"])
        for n, t, v, i in rows:
            w.writerow(([n] if with_step else []) + [f"{t:.4f}", f"{v:.6f}", f"{i:.6f}"])


write("pybamm_two_level_steps.csv", True)
write("pybamm_two_level.csv", False)
(OUT / "pybamm_two_level_expected.json").write_text(json.dumps(expected, indent=2) + "\n")
print(json.dumps(expected, indent=2), len(rows), "rows")
