"""Per-account baselines: weekday profile, level distribution, count model."""

from .counts import WindowCountModel, nbinom_mid_p
from .level import LEVEL_MODELS, LevelDistribution
from .weekday import WeekdayProfile

__all__ = ["LEVEL_MODELS", "LevelDistribution", "WeekdayProfile", "WindowCountModel", "nbinom_mid_p"]
