"""Write the built-in demo data set ``orchard_bruises.csv`` (invented; fixed seed).

Scenario (made up for the demo): an orchard cooperative's apple-sorting line.
Each row is one crate; the target ``bruised`` is the number of bruised apples
found in the crate at the packing table.  Features:

* ``drop_height_cm``  height the apples fall from the belt into the crate,
* ``fill_kg``         weight of apples in the crate,
* ``belt_speed``      conveyor speed in metres per second,
* ``air_temp_c``      air temperature in the packing hall (cold fruit is firmer).

The counts are drawn from a Poisson law whose log mean is a smooth, slightly
non-linear function of the features, so ``lossfam rank --demo`` should put
poisson first, with the continuous families scored on the unit-interval
footing and gamma and bernoulli listed as not applicable (zeros, counts > 1).

Run ``python lossfam/data/make_demo.py`` to regenerate the file; the seed is
fixed, so the output is the same on every run with the same numpy.
"""
from __future__ import annotations

import csv
import pathlib

import numpy as np

SEED = 20261201
N_ROWS = 3000
OUT = pathlib.Path(__file__).with_name("orchard_bruises.csv")


def make(seed: int = SEED, n: int = N_ROWS):
    rng = np.random.default_rng(seed)
    drop = rng.uniform(5.0, 60.0, n)
    fill = rng.normal(18.0, 2.5, n).clip(8.0, 26.0)
    speed = rng.uniform(0.2, 1.2, n)
    temp = rng.normal(9.0, 4.0, n)
    log_mu = (
        -0.4
        + 0.035 * drop
        + 0.05 * (fill - 18.0)
        + 0.9 * np.maximum(speed - 0.7, 0.0)
        + 0.02 * np.maximum(temp - 8.0, 0.0) ** 1.5
    )
    bruised = rng.poisson(np.exp(log_mu))
    return {
        "drop_height_cm": np.round(drop, 1),
        "fill_kg": np.round(fill, 2),
        "belt_speed": np.round(speed, 3),
        "air_temp_c": np.round(temp, 1),
        "bruised": bruised,
    }


def main():
    cols = make()
    names = list(cols)
    with open(OUT, "w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(names)
        for i in range(N_ROWS):
            out.writerow([cols[c][i] for c in names])
    print(f"wrote {OUT} ({N_ROWS} rows)")


if __name__ == "__main__":
    main()
