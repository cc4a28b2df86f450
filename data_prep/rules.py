"""Counting rules: every default of the data-preparation layer in one validated place."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from liftpool.data_prep.errors import ConfigError
from liftpool.data_prep.options import OptionsMixin

__all__ = [
    "CountingRules",
    "FREQUENCY",
    "VIEW_HISTORY",
    "BUILTIN_COVARIATES",
    "SMALL_CELL_POLICIES",
]

#: Built-in covariate: how many of the campaign's impressions the user was served.
FREQUENCY = "frequency"
#: Built-in covariate: the user's viewable share on other campaigns' measured impressions.
VIEW_HISTORY = "view_history"
BUILTIN_COVARIATES = (FREQUENCY, VIEW_HISTORY)
SMALL_CELL_POLICIES = ("merge", "drop")


@dataclass(frozen=True)
class CountingRules(OptionsMixin):
    """How logs become seen/unseen counts.

    Parameters
    ----------
    window_days : float
        Attribution window: a conversion counts when it is strictly after the
        user's first served impression of the campaign and no later than this
        many days after it.
    covariates : tuple of str
        Covariates whose cross defines the cells: the built-ins ``frequency``
        and ``view_history`` and/or columns of the users table.
    frequency_breaks : tuple of int
        Lower bounds of the impression-frequency buckets (1, 2, 3-4, 5-9, 10+ by default).
    view_history_breaks : tuple of float
        Lower bounds of the viewability-history bins; users with no measured
        impression on other campaigns get the bin ``unknown``.
    numeric_bins : int
        Number of quantile bins for a numeric users column.
    min_cell_users : int
        A cell needs at least this many users in each of seen and unseen.
    small_cells : {"merge", "drop"}
        What to do with cells below ``min_cell_users``: merge them into one
        remainder cell per campaign, or drop them.
    display_min_seconds, video_min_seconds : float
        Continuous seconds in view needed for a viewable display / video impression.
    large_ad_pixels : int
        Display ads at least this large (in pixels) need 30% rather than 50% in view.
    unexposed : bool
        Add an ``unexposed`` arm from users-table users never served the campaign
        (only meaningful when the users table covers the whole population).
    """

    window_days: float = 14.0
    covariates: tuple[str, ...] = BUILTIN_COVARIATES
    frequency_breaks: tuple[int, ...] = (1, 2, 3, 5, 10)
    view_history_breaks: tuple[float, ...] = (0.0, 0.25, 0.5, 0.75)
    numeric_bins: int = 4
    min_cell_users: int = 20
    small_cells: str = "merge"
    display_min_seconds: float = 1.0
    video_min_seconds: float = 2.0
    large_ad_pixels: int = 242_500
    unexposed: bool = False
    extra: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "covariates", tuple(self.covariates))
        object.__setattr__(self, "frequency_breaks", tuple(int(b) for b in self.frequency_breaks))
        object.__setattr__(self, "view_history_breaks", tuple(float(b) for b in self.view_history_breaks))
        if self.extra:
            raise ConfigError.unknown_keys(self.extra, self.option_names())
        if not (isinstance(self.window_days, (int, float)) and 0 < self.window_days < 36_500):
            raise ConfigError(problem=f"'window_days' must be a positive number of days below 36,500, got "
                                      f"{self.window_days!r}",
                              fix="set window_days to a number of days such as 14")
        if self.small_cells not in SMALL_CELL_POLICIES:
            raise ConfigError.invalid_choice("small_cells", self.small_cells, SMALL_CELL_POLICIES)
        for name in ("frequency_breaks", "view_history_breaks"):
            b = getattr(self, name)
            if len(b) < 1 or any(x >= y for x, y in zip(b, b[1:], strict=False)):
                raise ConfigError(problem=f"'{name}' must be strictly increasing, got {list(b)}",
                                  fix=f"give '{name}' as increasing lower bounds, e.g. [1, 2, 3, 5, 10]")
        if len(set(self.covariates)) != len(self.covariates):
            raise ConfigError(problem=f"'covariates' lists a covariate twice: {list(self.covariates)}",
                              fix="list each covariate once")
        if self.numeric_bins < 1:
            raise ConfigError(problem="'numeric_bins' must be at least 1", fix="set numeric_bins to e.g. 4")
        if self.min_cell_users < 1:
            raise ConfigError(problem="'min_cell_users' must be at least 1", fix="set min_cell_users to e.g. 20")
        for name in ("display_min_seconds", "video_min_seconds"):
            if not getattr(self, name) > 0:
                raise ConfigError(problem=f"'{name}' must be positive", fix=f"set '{name}' > 0")
        if self.large_ad_pixels < 1:
            raise ConfigError(problem="'large_ad_pixels' must be positive", fix="set large_ad_pixels to 242500")


    @property
    def window_seconds(self) -> int:
        return int(round(self.window_days * 86400))
