"""Transitional: the prior value now lives in `registry.values.prior`."""

from registry.values.families import NAMES as _NAMES
from registry.values.prior import Component, EntryUse, Prior
from registry.values.scales import PRIOR_SCALES as SCALES

FAMILIES = _NAMES

__all__ = ["FAMILIES", "SCALES", "Component", "EntryUse", "Prior"]
