"""One fit: row accounting, the GLM, training profiles, holdout metrics and notes -> a fitted model."""
