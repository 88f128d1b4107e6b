"""Generate the example project's data: an invented greenhouse basil trial.

Scenario (made up for this example): 180 basil plants grown on 12 benches of a
research greenhouse receive different daily light integrals (DLI, mol/m²/day)
and nutrient-solution strengths (electrical conductivity, EC, mS/cm). Fresh
harvest mass (g) is recorded at day 35.

Built in, so every check has something to find:

* mass grows linearly with the *logarithm* of light (a curve that log2(light) straightens);
* the spread of mass grows with its mean (multiplicative noise);
* benches differ (a shared bench effect: grouped, not independent, errors);
* a few EC readings are missing;
* two data-entry errors: a light reading typed ten times too large, and a mass
  typed with an extra digit. The report excludes both, with reasons.

Run ``python generate_data.py`` to rewrite ``data/basil_trial.csv``; the seed is
fixed, so the file is identical every time.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

SEED = 20260415
N_BENCHES = 12
PLANTS_PER_BENCH = 15


def generate(seed: int = SEED) -> list[dict[str, object]]:
    """Return the trial's rows as dictionaries (column -> value)."""
    rng = np.random.default_rng(seed)
    n = N_BENCHES * PLANTS_PER_BENCH
    bench = np.repeat([f"B{b:02d}" for b in range(1, N_BENCHES + 1)], PLANTS_PER_BENCH)
    bench_effect = np.repeat(rng.normal(0.0, 0.07, N_BENCHES), PLANTS_PER_BENCH)
    light = np.round(np.exp(rng.uniform(np.log(6.0), np.log(40.0), n)), 1)
    ec = np.round(rng.uniform(1.0, 2.6, n), 2)
    position = np.tile(np.arange(1, PLANTS_PER_BENCH + 1), N_BENCHES)
    # linear in log2(light) (so curved in light itself), increasing in EC; the noise is
    # proportional to the mean (so the spread grows with the fitted value) and shared by bench
    mean_mass = -75.0 + 52.0 * np.log2(light) + 22.0 * ec
    mass = np.round(mean_mass * (1.0 + bench_effect + rng.normal(0.0, 0.14, n)), 1)
    ids = [f"P{i:03d}" for i in range(1, n + 1)]
    ec_text: list[object] = list(ec)
    for i in rng.choice(n, size=4, replace=False):
        ec_text[int(i)] = ""  # sensor dropout: EC not recorded
    # data-entry errors
    light[40] = round(light[40] * 10, 1)  # decimal point slipped
    mass[117] = round(mass[117] * 10, 1)  # extra digit typed
    ec_text[117] = 1.05
    return [
        {
            "plant_id": ids[i],
            "bench": bench[i],
            "position": int(position[i]),
            "light_dli": float(light[i]),
            "ec_ms": ec_text[i],
            "mass_g": float(mass[i]),
        }
        for i in range(n)
    ]


def main() -> None:
    rows = generate()
    out = Path(__file__).parent / "data" / "basil_trial.csv"
    out.parent.mkdir(exist_ok=True)
    with out.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=list(rows[0]), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    print(f"wrote {len(rows)} rows to {out}")


if __name__ == "__main__":
    main()
