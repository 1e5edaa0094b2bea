"""Checks of a built prior: what it predicts for a planned study, the posterior and the
prior-data conflict after new data, how the posterior moves with the discount, and the
operating characteristics of a planned trial that borrows through it."""
