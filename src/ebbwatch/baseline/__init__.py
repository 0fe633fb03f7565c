"""Per-account baselines: weekday profile and the negative-binomial count model."""

from .counts import nbinom_mid_p, pooled_dispersion
from .weekday import WeekdayProfile

__all__ = ["WeekdayProfile", "nbinom_mid_p", "pooled_dispersion"]
