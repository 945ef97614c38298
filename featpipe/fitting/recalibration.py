"""Calibration intercept and slope of a model on scored rows, fitted by Newton steps in the engine.

See featpipe.sqlgen.recalibration for the two fits. Both start at the perfectly calibrated point
(a0 = 0; a = 0, b = 1), so a well-calibrated model needs two or three passes; a gaussian model needs
one step (its fits are linear) and one pass to confirm it. A fit that does not settle within
MAX_STEPS, or whose information is singular (every row has the same linear predictor, so no slope can
be fitted), gives None.
"""

from __future__ import annotations

import math

from sqlglot import exp

from ..engines.base import Engine
from ..sqlgen.recalibration import CANONICAL, recalibration_query

MAX_STEPS = 30
TOLERANCE = 1e-12  # largest change of an estimate, relative to 1 + |estimate|, that counts as settled


def recalibration(engine: Engine, rows: exp.Select, family: str) -> dict[str, float | None]:
    """{"calibration_intercept": a0, "calibration_slope": b} over `rows` (KEY, OBSERVED, ETA)."""
    if family not in CANONICAL:
        return {"calibration_intercept": None, "calibration_slope": None}
    offset_intercept, intercept, slope = 0.0, 0.0, 1.0
    large_done = slope_done = False
    large_value: float | None = None
    slope_value: float | None = None
    for _ in range(MAX_STEPS):
        (row,) = engine.fetch(recalibration_query(rows, family, offset_intercept, intercept, slope))
        score_large, information_large, score, score_eta, information, information_eta, information_eta2 = (
            _number(value) for value in row)
        if not large_done:
            if not information_large > 0:
                large_done = True
            else:
                step = score_large / information_large
                offset_intercept += step
                if abs(step) <= TOLERANCE * (1 + abs(offset_intercept)):
                    large_done, large_value = True, offset_intercept
        if not slope_done:
            determinant = information * information_eta2 - information_eta * information_eta
            if not determinant > 1e-12 * max(information * information_eta2, 1e-300):
                slope_done = True
            else:
                step_intercept = (information_eta2 * score - information_eta * score_eta) / determinant
                step_slope = (information * score_eta - information_eta * score) / determinant
                intercept, slope = intercept + step_intercept, slope + step_slope
                if max(abs(step_intercept) / (1 + abs(intercept)), abs(step_slope) / (1 + abs(slope))) <= TOLERANCE:
                    slope_done, slope_value = True, slope
        if large_done and slope_done:
            break
    return {"calibration_intercept": large_value, "calibration_slope": slope_value}


def _number(value) -> float:
    return math.nan if value is None else float(value)
