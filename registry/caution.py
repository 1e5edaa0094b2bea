"""The caution every prior carries: one text for the CLI, stored priors and emitted code."""

CAUTION = (
    "Caution: where this prior informs decisions about people (trial design, regulatory "
    "submissions), borrowing must be pre-specified, its operating characteristics checked "
    "by simulation, and local regulations and qualified statistical review followed."
)
