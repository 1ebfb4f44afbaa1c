"""Generate tests/fixtures/pybamm_thevenin_hppc.csv and its expected values.

An outside check for packbench's pulse-power characterization: PyBaMM's
equivalent-circuit (Thevenin) model, with parameters chosen here, runs the
hybrid pulse power method (US DOE/INL battery test manuals; fact sheet
characterization.md §1), and packbench analyses the log as any foreign log.

Library:     PyBaMM 26.10.1.1 (pip install pybamm==26.10.1.1), numpy 2.4.6
Model:       pybamm.equivalent_circuit.Thevenin() (one RC pair)
Parameters:  our own (a 5 Ah cell, OCV table of a typical li-ion shape,
             common practice): R0 = 15 mOhm, R1 = 10 mOhm, C1 = 3000 F
             (tau1 = 30 s), constant over state of charge and temperature.
Experiment:  from 0.5 state of charge: charge at C/2 to 4.15 V, hold
             4.15 V to C/50 (the table's 4.19 V at full would take the
             model past its maximum state of charge), rest 1 h; then ten
             levels of: 10 s discharge at 1C, 40 s rest, 10 s charge at
             0.75C (0.1 s sampling), and after the first nine C/3 for
             18 min (10 % of the capacity; 10 s sampling) and a 1 h rest
             (1 s sampling for 2 min, then 20 s); a last 1 h rest.
Log:         foreign: "Time [s]", "Voltage [V]", "Current [A]" (positive on
             discharge, PyBaMM's sign).
Expected:    the model's R0, R1, C1; and per level the method's formulas
             applied to the model's own output (numpy here): R_dis =
             (V_t0 - V_t1)/(I_t1 - I_t0), t0 the last row before the
             discharge pulse, t1 its last row; R_chg the same over the
             charge pulse; and PyBaMM's SoC and OCV at t0.

Run: /path/to/venv/bin/python scripts/pybamm_hppc_fixture.py  (about 10 s)
"""
import json
import pathlib

import numpy as np
import pybamm

OUT = pathlib.Path(__file__).resolve().parent.parent / "tests" / "fixtures"

Q, R0, R1, C1 = 5.0, 0.015, 0.010, 3000.0
soc_pts = np.array([0.0, 0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 1.0])
ocv_pts = np.array([3.00, 3.30, 3.45, 3.55, 3.62, 3.66, 3.71, 3.76, 3.82, 3.89, 3.97, 4.06, 4.11, 4.19])

model = pybamm.equivalent_circuit.Thevenin()
pv = model.default_parameter_values
pv.update(
    {
        "Cell capacity [A.h]": Q,
        "Nominal cell capacity [A.h]": Q,
        "Initial SoC": 0.5,
        "Open-circuit voltage [V]": lambda z: pybamm.Interpolant(
            soc_pts, ocv_pts, z, interpolator="linear"
        ),
        "R0 [Ohm]": R0,
        "R1 [Ohm]": R1,
        "C1 [F]": C1,
        "Element-1 initial overpotential [V]": 0.0,
        "Entropic change [V/K]": 0.0,
        "Upper voltage cut-off [V]": 4.3,
        "Lower voltage cut-off [V]": 2.8,
    }
)
Ip = 1.0 * Q
pulse = [
    f"Discharge at {Ip} A for 10 seconds (0.1 second period)",
    "Rest for 40 seconds (0.1 second period)",
    f"Charge at {0.75 * Ip} A for 10 seconds (0.1 second period)",
]
down = [
    "Discharge at C/3 for 18 minutes (10 second period)",
    "Rest for 2 minutes (1 second period)",
    "Rest for 58 minutes (20 second period)",
]
steps = [
    "Charge at C/2 until 4.15 V (10 second period)",
    "Hold at 4.15 V until C/50 (10 second period)",
    "Rest for 1 hour (20 second period)",
] + (pulse + down) * 9 + pulse + ["Rest for 1 hour (20 second period)"]
sol = pybamm.Simulation(model, experiment=pybamm.Experiment(steps), parameter_values=pv).solve()

t = sol["Time [s]"].entries
v = sol["Voltage [V]"].entries
i = sol["Current [A]"].entries
soc = sol["SoC"].entries
ocv = sol["Open-circuit voltage [V]"].entries

with open(OUT / "pybamm_thevenin_hppc.csv", "w") as f:
    f.write("Time [s],Voltage [V],Current [A]\n")
    for k in range(len(t)):
        f.write(f"{t[k]:.6f},{v[k]:.6f},{i[k]:.6f}\n")

# The method's formulas on the model's own output, level by level.
thr = 0.01 * Q
levels = []
k = 1
while k < len(t):
    # A discharge edge after a rest of 10 min or more.
    if i[k] > thr and abs(i[k - 1]) <= thr:
        j = k - 1
        while j > 0 and abs(i[j - 1]) <= thr:
            j -= 1
        rest = t[k - 1] - t[j]
        e = k
        while e + 1 < len(t) and i[e + 1] > thr:
            e += 1
        if rest >= 600 and t[e] - t[k - 1] <= 180:
            t0, t1 = k - 1, e
            r_dis = (v[t0] - v[t1]) / (i[t1] - i[t0])
            # The charge pulse: the next rows with current below -thr.
            c = e + 1
            while c < len(t) and i[c] >= -thr:
                c += 1
            t2 = c - 1
            t3 = c
            while t3 + 1 < len(t) and i[t3 + 1] < -thr:
                t3 += 1
            # (PyBaMM's sign: discharge positive; R_chg = (V_t3 - V_t2)/(I_t2 - I_t3).)
            r_chg = (v[t3] - v[t2]) / (i[t2] - i[t3])
            levels.append(
                {
                    "t0_s": float(t[t0]),
                    "soc": float(soc[t0]),
                    "ocv_v": float(ocv[t0]),
                    "voltage_t0_v": float(v[t0]),
                    "r_discharge_ohm": float(r_dis),
                    "r_charge_ohm": float(r_chg),
                }
            )
        k = e + 1
    k += 1

expected = {
    "library": "pybamm",
    "version": pybamm.__version__,
    "numpy": np.__version__,
    "model": "Thevenin, one RC pair",
    "capacity_ah": Q,
    "r0_ohm": R0,
    "r1_ohm": R1,
    "c1_f": C1,
    "tau1_s": R1 * C1,
    "levels": levels,
}
(OUT / "pybamm_thevenin_hppc_expected.json").write_text(json.dumps(expected, indent=2) + "\n")
print(len(t), "rows,", len(levels), "levels")
