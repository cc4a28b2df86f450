"""The engines' common output: cell-level counts before the cell rules are applied."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

__all__ = ["RawCounts", "USERS_COLUMNS", "CONVERSION_COLUMNS", "WINDOW_COLUMNS", "CAMPAIGN_COLUMNS"]

USERS_COLUMNS = ["campaign", "cell", "arm", "users"]
CONVERSION_COLUMNS = ["campaign", "cell", "arm", "outcome", "conversions"]
WINDOW_COLUMNS = ["campaign", "outcome", "before_first_serve", "in_window", "after_window"]
CAMPAIGN_COLUMNS = ["campaign", "impressions", "measured_impressions", "viewable_impressions",
                    "users_served", "users_unmeasured_only", "users_without_covariates"]


@dataclass
class RawCounts:
    """What an engine hands to :func:`liftpool.data_prep.counts.finalize`.

    Attributes
    ----------
    users : DataFrame
        ``campaign, cell, arm, users`` for every non-empty (campaign, cell, arm).
    conversions : DataFrame
        ``campaign, cell, arm, outcome, conversions`` (users with at least one
        conversion in the window), non-zero rows only.
    windows : DataFrame
        Conversion events of exposed users by (campaign, outcome) and where they fell.
    campaigns : DataFrame
        Per-campaign impression and user tallies.
    totals : dict
        Whole-input tallies (rows read, conversions with unknown outcomes...).
    """

    users: pd.DataFrame
    conversions: pd.DataFrame
    windows: pd.DataFrame
    campaigns: pd.DataFrame
    totals: dict = field(default_factory=dict)

    def normalized(self) -> RawCounts:
        """Sorted, integer-typed copies: two engines' results compare equal with ``equals``."""

        def norm(df: pd.DataFrame, keys: list[str]) -> pd.DataFrame:
            df = df.copy()
            for c in df.columns:
                if c in ("campaign", "cell", "arm", "outcome"):
                    df[c] = df[c].astype(str)
                else:
                    df[c] = df[c].astype("int64")
            return df.sort_values(keys).reset_index(drop=True)

        return RawCounts(
            users=norm(self.users[USERS_COLUMNS], ["campaign", "cell", "arm"]),
            conversions=norm(self.conversions[CONVERSION_COLUMNS], ["campaign", "cell", "arm", "outcome"]),
            windows=norm(self.windows[WINDOW_COLUMNS], ["campaign", "outcome"]),
            campaigns=norm(self.campaigns[CAMPAIGN_COLUMNS], ["campaign"]),
            totals={k: int(v) for k, v in self.totals.items()},
        )
