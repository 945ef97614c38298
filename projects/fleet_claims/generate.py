"""Write data/vehicle_years.csv and data/claim_costs.csv: invented claim counts per vehicle-year for a
commercial fleet, and the cost of each of those claims.

Nothing here describes a real fleet, insurer or driver. The generator is deterministic (a fixed seed,
fixed rounding), so running it again rewrites a byte-identical file.

Each row is one vehicle observed for part or all of a policy year. Claims are Poisson with mean
exposure_years * exp(eta), where eta grows with vehicle age (levelling off after twelve years), with
the kilometres each driver covers (a ratio), with the share of kilometres driven at night (a ratio,
more so for heavy trucks), and shifts by vehicle class. annual_km and night_km are annualised, so a
part-year row states the same yearly rate of use as a full-year row would.

Each claim then gets a cost: gamma with shape 2 (a coefficient of variation of 0.71) around
exp(true_log_cost), which rises with vehicle class, with age and for claims at night. The costs use a
second generator, so adding them left vehicle_years.csv unchanged.

Run: python generate.py
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

SEED = 20240612
ROWS = 4000
OUTPUT = Path(__file__).resolve().parent / "data" / "vehicle_years.csv"
COSTS = OUTPUT.with_name("claim_costs.csv")
COST_SHAPE = 2.0

CLASSES = ["van", "light_truck", "heavy_truck"]
CLASS_SHARES = [0.45, 0.30, 0.25]
# Per class: median annual km, mean extra drivers beyond the first, night-share beta parameters,
# and the shift of the log claim rate (van is the reference).
CLASS_PROFILE = {
    "van": dict(km=35000.0, extra_drivers=0.4, night=(2.0, 9.0), shift=0.0),
    "light_truck": dict(km=45000.0, extra_drivers=0.6, night=(2.0, 8.0), shift=0.35),
    "heavy_truck": dict(km=95000.0, extra_drivers=1.2, night=(2.5, 6.0), shift=0.55),
}


def true_log_rate(age, km_per_driver_thousands, night_share, vehicle_class):
    """The yearly claim-rate mechanism the demo model should recover."""
    heavy = (vehicle_class == "heavy_truck").astype(float)
    shift = np.array([CLASS_PROFILE[c]["shift"] for c in vehicle_class])
    return (
        np.log(0.04)
        + 0.06 * np.minimum(age, 12.0)
        + 0.015 * km_per_driver_thousands
        + 2.4 * night_share
        + 2.0 * night_share * heavy
        + shift
    )


def true_log_cost(age, at_night, vehicle_class):
    """The mean cost of one claim, in currency units, on the log scale: the severity the demo model should recover."""
    shift = {"van": 0.0, "light_truck": 0.25, "heavy_truck": 0.7}
    return np.log(2500.0) + np.array([shift[c] for c in vehicle_class]) + 0.03 * np.minimum(age, 12.0) + 0.3 * at_night


def claim_costs(rows: list[list[str]], rng: np.random.Generator) -> list[list[str]]:
    """One row per claim of `rows`: its vehicle's class and age, whether it happened at night, its cost."""
    claims = [(row, k) for row in rows for k in range(int(row[-1]))]
    vehicle_class = np.array([row[6] for row, _ in claims])
    age = np.array([float(row[1]) for row, _ in claims])
    night_share = np.array([float(row[5]) / float(row[3]) for row, _ in claims])
    at_night = (rng.random(len(claims)) < night_share).astype(float)
    mean = np.exp(true_log_cost(age, at_night, vehicle_class))
    cost = np.round(rng.gamma(COST_SHAPE, mean / COST_SHAPE), 2)
    return [
        [str(int(row[0]) * 10 + k), row[0], row[6], row[1], "true" if at_night[i] else "false", f"{cost[i]:.2f}"]
        for i, (row, k) in enumerate(claims)
    ]


def generate(rng: np.random.Generator) -> list[list[str]]:
    vehicle_class = rng.choice(CLASSES, size=ROWS, p=CLASS_SHARES)
    profile = [CLASS_PROFILE[c] for c in vehicle_class]
    age = np.round(np.minimum(rng.gamma(shape=2.0, scale=3.0, size=ROWS), 20.0), 1)
    part_year = rng.random(ROWS) < 0.30
    exposure = np.where(part_year, np.round(rng.uniform(0.05, 1.0, size=ROWS), 3), 1.0)
    median_km = np.array([p["km"] for p in profile])
    annual_km = np.round(median_km * np.exp(rng.normal(0.0, 0.35, size=ROWS)), 1)
    # Vehicles that run more kilometres are shared by more drivers, heavy trucks most of all,
    extra = np.array([p["extra_drivers"] for p in profile]) * annual_km / median_km
    # and no one covers more than 100,000 km a year alone.
    drivers = np.maximum(np.minimum(1 + rng.poisson(extra), 5), np.ceil(annual_km / 100000.0))
    night_a = np.array([p["night"][0] for p in profile])
    night_b = np.array([p["night"][1] for p in profile])
    night_km = np.minimum(np.round(annual_km * rng.beta(night_a, night_b), 1), annual_km)

    eta = true_log_rate(age, annual_km / drivers / 1000.0, night_km / annual_km, vehicle_class)
    claims = rng.poisson(exposure * np.exp(eta))

    ids = 5000000 + rng.choice(1000000, size=ROWS, replace=False)
    ids.sort()
    return [
        [
            str(int(ids[i])),
            f"{age[i]:.1f}",
            f"{exposure[i]:.3f}",
            f"{annual_km[i]:.1f}",
            str(int(drivers[i])),
            f"{night_km[i]:.1f}",
            str(vehicle_class[i]),
            str(int(claims[i])),
        ]
        for i in range(ROWS)
    ]


def write_csv(path: Path, header: list[str], rows: list[list[str]]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_suffix(".csv.tmp")
    with temporary.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)
    temporary.replace(path)


def main() -> None:
    rows = generate(np.random.default_rng(SEED))
    write_csv(OUTPUT, ["vehicle_year_id", "vehicle_age_years", "exposure_years", "annual_km",
                       "drivers", "night_km", "vehicle_class", "claims"], rows)
    costs = claim_costs(rows, np.random.default_rng(SEED + 1))
    write_csv(COSTS, ["claim_id", "vehicle_year_id", "vehicle_class", "vehicle_age_years", "at_night", "cost"], costs)
    claims = sum(int(row[-1]) for row in rows)
    exposure = sum(float(row[2]) for row in rows)
    print(
        f"wrote {OUTPUT.name}: {len(rows)} vehicle-years, {exposure:.1f} years of exposure, "
        f"{claims} claims, {claims / exposure:.3f} claims per vehicle-year; {COSTS.name}: mean cost "
        f"{sum(float(row[-1]) for row in costs) / len(costs):.2f}"
    )


if __name__ == "__main__":
    main()
