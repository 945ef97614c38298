"""GLM fitting where the data is: IRLS over sufficient statistics, penalties, inference, problem checks."""

from .fit import INTERCEPT, GlmFit, fit_glm, fit_glm_arrays

__all__ = ["INTERCEPT", "GlmFit", "fit_glm", "fit_glm_arrays"]
