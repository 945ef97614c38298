"""The conventions a fitted file's figures follow, stated in the file itself so a reader comparing them
with R or statsmodels knows what differs: pure text from the fit's settings."""

from __future__ import annotations


NO_LIKELIHOOD = {
    "tweedie": "none: a tweedie density is an infinite series per row, which no sum gives; compare tweedie fits by deviance",
    "quasipoisson": "none: a quasi family has no likelihood (as in R's glm), only the poisson mean and variance shape",
    "quasibinomial": "none: a quasi family has no likelihood (as in R's glm), only the binomial mean and variance shape",
}


ROBUST = ("sandwich standard errors: bread (X'WX)^-1, the expected information at the fitted coefficients, "
          "around the sum of outer products of the rows' score contributions, times n / (n - p): HC1, chosen over "
          "HC0 because it is the cluster form with every row its own cluster and less optimistic in small samples")
CLUSTERED = ("cluster-robust sandwich standard errors: bread (X'WX)^-1, the expected information, around the sum over "
             "clusters of the outer products of each cluster's summed scores, times G / (G - 1) (n - 1) / (n - p)")


def conventions(*, statistic: str, penalized: bool, family: str = "", errors: str = "model") -> dict[str, str]:
    """What AIC, BIC, the p-values, the VIF and the effect steps of one fit mean, by key."""
    counted = "the effective degrees of freedom (trace of the hat matrix)" if penalized else "the coefficients, intercept included"
    if errors != "model" and not penalized:
        p_values = ("two-sided Wald z tests against the normal distribution from the sandwich standard errors (a "
                    "large-sample result); they assume the model's mean is right and the "
                    + ("clusters independent, rows within a cluster possibly correlated" if errors == "cluster"
                       else "rows independent, their variance possibly not the family's"))
    elif penalized:
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
    robust = {"errors": CLUSTERED if errors == "cluster" else ROBUST} if errors != "model" else {}
    return {
        **likelihood,
        **robust,
        "p_values": p_values,
        "pearson_dispersion": ("Pearson chi2 / (n - p); above 1.5 (a common screen) poisson counts or binomial successes "
                               "out of several trials are overdispersed; a 0/1 target cannot show overdispersion"),
        "vif": ("in the IRLS-weighted metric at the fitted coefficients, as the coefficient covariance gives it: the "
                "factor by which collinearity multiplies an estimate's variance; 5 and 10 are the usual screens"),
        "step": ("effects are per the spec's step, or per one training standard deviation of the term when none is "
                 "given; an indicator is read as 1 rather than 0"),
    }
