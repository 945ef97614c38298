"""`featpipe new`: a small working project (invented subscription-churn data) to start from."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..atomic import write_text_atomic
from ..errors import FeatpipeError

PROJECT_YAML = """\
name: {name}
engine:
  kind: duckdb
  path: build/{name}.duckdb
inputs:
  subscriptions:
    key: subscription_id
    load: data/subscriptions.csv
    columns:
      subscription_id: BIGINT
      tenure_months: DOUBLE
      monthly_fee: DOUBLE
      support_calls: BIGINT
      churned: BIGINT
"""

TERMS_SQL = """\
-- Terms describing how a subscriber uses and pays for the service (invented example).
SELECT
  -- Fee paid per month of tenure: new subscribers on a high fee are the most likely to leave.
  monthly_fee / NULLIF(tenure_months, 0) AS fee_per_tenure_month,
  -- Subscribers who called support three times or more.
  CASE WHEN support_calls >= 3 THEN 1 ELSE 0 END AS frequent_caller
FROM subscriptions
"""

SPEC_YAML = """\
input: subscriptions
target: churned
family: binomial
terms: [fee_per_tenure_month, frequent_caller, tenure_months]
holdout: {fraction: 0.3, salt: "v1"}
threshold: 0.5
expect: {fee_per_tenure_month: positive, frequent_caller: positive}
step: {tenure_months: 12}
notes: {frequent_caller: "Three calls is the service team's own escalation rule."}
"""

GITIGNORE = "build/\n"


def _demo_rows(rows: int = 400) -> str:
    """Deterministic invented subscribers, so a new project fits out of the box."""
    rng = np.random.default_rng(20261201)
    tenure = rng.integers(1, 60, rows).astype(float)
    fee = np.round(rng.uniform(10, 80, rows), 2)
    calls = rng.poisson(1.2, rows)
    log_odds = -2.0 + 4.0 * fee / tenure / 10 + 0.9 * (calls >= 3) - 0.02 * tenure
    churned = (rng.uniform(size=rows) < 1 / (1 + np.exp(-log_odds))).astype(int)
    lines = ["subscription_id,tenure_months,monthly_fee,support_calls,churned"]
    lines += [f"{i + 1},{tenure[i]:.0f},{fee[i]:.2f},{calls[i]},{churned[i]}" for i in range(rows)]
    return "\n".join(lines) + "\n"


def scaffold(path: Path) -> list[str]:
    """Write the project files into `path`; refuses a folder that already holds files."""
    if path.exists() and (not path.is_dir() or any(path.iterdir())):
        raise FeatpipeError(f"{path} already exists and is not empty; choose a new folder")
    name = path.resolve().name.replace("-", "_")
    files = {
        "featpipe.yaml": PROJECT_YAML.format(name=name),
        "terms/usage.sql": TERMS_SQL,
        "specs/churn.yaml": SPEC_YAML,
        "data/subscriptions.csv": _demo_rows(),
        ".gitignore": GITIGNORE,
    }
    for relative, text in files.items():
        write_text_atomic(path / relative, text)
    return list(files)
