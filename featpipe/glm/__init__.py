"""GLM fitting where the data is: IRLS over sufficient statistics, penalties, inference, problem checks."""

from .fit import INTERCEPT, Glm
from .result import (
    Coefficient,
    Convergence,
    GlmResult,
    GoodnessOfFit,
    Inference,
    TrainingRows,
)

__all__ = ["INTERCEPT", "Coefficient", "Convergence", "Glm", "GlmResult", "GoodnessOfFit", "Inference", "TrainingRows"]
