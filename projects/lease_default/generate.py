"""Write data/leases.csv: invented equipment leases to small firms, with a known default mechanism.

Nothing here describes a real firm or a real portfolio. The generator is deterministic (a fixed seed,
fixed rounding), so running it again rewrites a byte-identical file.

The true log-odds of default within 12 months are curved in the raw inputs: they rise with the share
of revenue the lease payment takes, rise faster still for firms under two years old, rise with past
late payments (capped at three), and shift by sector. A logistic regression on the raw columns cannot
draw that boundary; one on the engineered terms in terms/ can.

Run: python generate.py
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

SEED = 20240611
ROWS = 5000
OUTPUT = Path(__file__).resolve().parent / "data" / "leases.csv"

SECTORS = ["construction", "retail", "logistics", "food_service", "manufacturing", "health"]
SECTOR_SHARES = [0.20, 0.18, 0.16, 0.14, 0.17, 0.15]
# Sector shifts on the log-odds scale (manufacturing is the reference).
SECTOR_EFFECT = {
    "construction": 0.55,
    "retail": 0.15,
    "logistics": 0.10,
    "food_service": 0.70,
    "manufacturing": 0.0,
    "health": -0.55,
}
TERMS = np.array([24, 36, 48, 60])
TERM_SHARES = [0.20, 0.35, 0.30, 0.15]
ANNUAL_RATE = 0.09  # the lessor's invented financing rate


def true_log_odds(firm_age, revenue, payment, late, sector):
    """The default mechanism the demo model should recover."""
    ratio = payment / revenue
    young = (firm_age < 2.0).astype(float)
    sector_shift = np.array([SECTOR_EFFECT[s] for s in sector])
    return (
        -3.90
        + 9.0 * ratio
        + 0.45 * young
        + 14.0 * ratio * young
        - 0.035 * firm_age
        - 0.25 * np.log(revenue / 30000.0)
        + 0.45 * np.minimum(late, 3)
        + sector_shift
    )


def generate(rng: np.random.Generator) -> list[list[str]]:
    firm_age = np.round(rng.gamma(shape=1.6, scale=4.5, size=ROWS), 1)
    sector = rng.choice(SECTORS, size=ROWS, p=SECTOR_SHARES)
    revenue = np.round(np.exp(rng.normal(np.log(30000.0), 0.75, size=ROWS)), 2)
    term = rng.choice(TERMS, size=ROWS, p=TERM_SHARES)
    # Equipment cost in months of revenue; the payment is an ordinary annuity over the term.
    cost = revenue * np.exp(rng.normal(np.log(2.6), 0.55, size=ROWS))
    monthly_rate = ANNUAL_RATE / 12.0
    payment = np.round(cost * monthly_rate / (1.0 - (1.0 + monthly_rate) ** (-term)), 2)
    # Younger firms have had less time to pay late.
    late = rng.poisson(0.35 + 0.06 * np.minimum(firm_age, 10.0), size=ROWS)

    eta = true_log_odds(firm_age, revenue, payment, late, sector)
    defaulted = (rng.random(ROWS) < 1.0 / (1.0 + np.exp(-eta))).astype(int)

    # Revenue as the lessor's file holds it: about 1% never reported, a handful recorded as zero.
    reported = revenue.astype(object)
    missing = rng.choice(ROWS, size=50, replace=False)
    reported[missing] = None
    zero = rng.choice(np.setdiff1d(np.arange(ROWS), missing), size=8, replace=False)
    reported[zero] = 0.0

    lease_ids = 100000 + rng.choice(900000, size=ROWS, replace=False)
    lease_ids.sort()
    rows = []
    for i in range(ROWS):
        rows.append([
            str(int(lease_ids[i])),
            f"{firm_age[i]:.1f}",
            "" if reported[i] is None else f"{reported[i]:.2f}",
            f"{payment[i]:.2f}",
            str(int(term[i])),
            str(sector[i]),
            str(int(late[i])),
            str(int(defaulted[i])),
        ])
    return rows


def main() -> None:
    rows = generate(np.random.default_rng(SEED))
    OUTPUT.parent.mkdir(parents=True, exist_ok=True)
    temporary = OUTPUT.with_suffix(".csv.tmp")
    with temporary.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle, lineterminator="\n")
        writer.writerow([
            "lease_id", "firm_age_years", "monthly_revenue", "monthly_payment",
            "term_months", "sector", "past_late_payments", "defaulted_12m",
        ])
        writer.writerows(rows)
    temporary.replace(OUTPUT)
    defaults = sum(int(row[-1]) for row in rows)
    missing = sum(1 for row in rows if row[2] == "")
    zero = sum(1 for row in rows if row[2] == "0.00")
    print(
        f"wrote {OUTPUT.name}: {len(rows)} leases, default rate {defaults / len(rows):.1%}, "
        f"revenue missing {missing}, revenue zero {zero}"
    )


if __name__ == "__main__":
    main()
