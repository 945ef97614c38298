"""The conventions a fitted file's figures follow, stated in the file itself so a reader comparing them
with R or statsmodels knows what differs: pure text from the fit's settings."""

from __future__ import annotations


NO_LIKELIHOOD = {
    "tweedie": "none: a tweedie density is an infinite series per row, which no sum gives; compare tweedie fits by deviance",
    "quasipoisson": "none: a quasi family has no likelihood (as in R's glm), only the poisson mean and variance shape",
    "quasibinomial": "none: a quasi family has no likelihood (as in R's glm), only the binomial mean and variance shape",
}


def conventions(*, statistic: str, penalized: bool, family: str = "") -> dict[str, str]:
    """What AIC, BIC, the p-values, the VIF and the effect steps of one fit mean, by key."""
    counted = "the effective degrees of freedom (trace of the hat matrix)" if penalized else "the coefficients, intercept included"
    if penalized:
        p_values = "none: a penalized fit has no valid Wald inference, so no standard errors, intervals or p-values"
    elif statistic == "t":
        p_values = ("two-sided Wald t tests with n - p degrees of freedom, the dispersion estimated by Pearson chi2 / (n - p); "
                    "they assume the model's mean and variance are right and the rows independent")
    else:
        p_values = ("two-sided Wald z tests against the normal distribution, the dispersion fixed at 1; they assume the "
                    "model's mean and variance are right (no overdispersion) and the rows independent")
    if family in NO_LIKELIHOOD:
        likelihood = {"aic": NO_LIKELIHOOD[family], "bic": NO_LIKELIHOOD[family], "log_likelihood": NO_LIKELIHOOD[family]}
    else:
        likelihood = {
            "aic": f"-2 log-likelihood + 2 k, k {counted}; the gaussian scale is not counted (R's glm counts it)",
            "bic": f"-2 log-likelihood + k ln(n), n the training rows, k {counted} (the log-likelihood form)",
            "log_likelihood": "the full log-likelihood as R's logLik gives it; gaussian at the maximum-likelihood scale",
        }
        if family == "gamma":
            likelihood["aic"] += "; nor is the gamma dispersion"
            likelihood["log_likelihood"] = ("the full gamma log-likelihood at the Pearson dispersion, as statsmodels gives it "
                                            "(R's logLik takes deviance / n); none with variance weights")
    return {
        **likelihood,
        "p_values": p_values,
        "pearson_dispersion": ("Pearson chi2 / (n - p); above 1.5 (a common screen) poisson counts or binomial successes "
                               "out of several trials are overdispersed; a 0/1 target cannot show overdispersion"),
        "vif": ("in the IRLS-weighted metric at the fitted coefficients, as the coefficient covariance gives it: the "
                "factor by which collinearity multiplies an estimate's variance; 5 and 10 are the usual screens"),
        "step": ("effects are per the spec's step, or per one training standard deviation of the term when none is "
                 "given; an indicator is read as 1 rather than 0"),
    }
