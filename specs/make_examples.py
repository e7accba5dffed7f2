"""Generate the invented example data sets beside their specs (seeded; re-run to refresh).

Run: .venv/bin/python specs/make_examples.py

clinic_visits.csv  A fictional cohort: a blood marker (arbitrary units) read at irregular
                   clinic visits over the 104 weeks after enrolment; 160 patients, 1 to 9
                   visits each, visits more frequent early on.
pump_service.csv   Fictional equipment: vibration level (mm/s) of water pumps read at
                   unscheduled service calls over 36 months; 200 pumps, 2 to 7 calls each,
                   with multiplicative reading error (15% on the log scale); each pump
                   belongs to one of three depots (in turn, with no effect on the readings).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
DEPOTS = ("harbour", "hillside", "riverside")


def clinic_visits(seed: int = 20261201) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = 160
    visits = rng.integers(1, 10, n)
    rows = []
    for i in range(n):
        # Visit times: denser early, irregular (gamma gaps), censored at 104 weeks.
        gaps = rng.gamma(2.0, 7.0, visits[i])
        times = np.round(np.cumsum(gaps) - gaps[0] * rng.uniform(0, 1), 1)
        times = times[(times >= 0) & (times <= 104)]
        if times.size == 0:
            times = np.array([round(float(rng.uniform(0, 104)), 1)])
        xi = rng.normal(0, [6.0, 3.0])
        s = times / 104
        curve = 40 + 8 * s - 5 * s**2 + xi[0] * 1.0 + xi[1] * np.sin(np.pi * s) * 1.2
        for t, v in zip(times, curve + rng.normal(0, 1.5, times.size), strict=True):
            rows.append((f"P{i + 1:03d}", float(t), round(float(v), 2)))
    return pd.DataFrame(rows, columns=["patient", "week", "marker"])


def pump_service(seed: int = 4242) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    n = 200
    rows = []
    for i in range(n):
        m = rng.integers(2, 8)
        times = np.sort(np.round(rng.uniform(0, 36, m), 2))
        wear = rng.lognormal(0, 0.35)
        shift = rng.normal(0, 0.6)
        level = 2.0 + 0.08 * wear * times + shift + 0.4 * np.cos(2 * np.pi * times / 12)
        for t, v in zip(times, level * np.exp(rng.normal(0, 0.15, m)), strict=True):
            rows.append((f"pump-{i + 1:03d}", DEPOTS[i % 3], float(t), round(float(v), 3)))
    return pd.DataFrame(rows, columns=["pump", "depot", "month", "vibration"])


if __name__ == "__main__":
    clinic_visits().to_csv(HERE / "clinic_visits.csv", index=False)
    pump_service().to_csv(HERE / "pump_service.csv", index=False)
    print("written:", HERE / "clinic_visits.csv", HERE / "pump_service.csv")
