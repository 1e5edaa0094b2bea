"""Checks of a built prior: what it predicts for a planned study, the posterior and the
prior-data conflict after new data, and how the posterior moves with the discount."""
