"""Counts table to index arrays: the bridge from the counts DataFrame to the model (pure NumPy)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from liftpool.data_prep.counts import validate_counts

__all__ = ["Design", "make_design", "CampaignFlags"]


@dataclass
class CampaignFlags:
    """Data situations a reader of the results must know about, per campaign."""

    no_placebo: list[str] = field(default_factory=list)
    zero_conversions_arm: list[str] = field(default_factory=list)
    no_unexposed: list[str] = field(default_factory=list)
    single_campaign: bool = False
    no_placebo_anywhere: bool = False

    def messages(self) -> list[str]:
        out = []
        if self.no_placebo_anywhere:
            out.append("No placebo outcome anywhere: the bias cannot be estimated, so no bias-corrected lift "
                       "is given; only the uncorrected (cell-adjusted) lift, which still contains any "
                       "browsing or targeting bias. Add placebo outcomes to the outcomes file.")
        elif self.no_placebo:
            out.append("No placebo outcome for " + ", ".join(self.no_placebo) + ": their bias is borrowed from "
                       "the other campaigns' placebos (partial pooling), so their intervals rest on the "
                       "assumption that they share the portfolio's bias.")
        if self.zero_conversions_arm:
            out.append("Zero target conversions in the seen or unseen arm for " + ", ".join(self.zero_conversions_arm)
                       + ": their estimates lean heavily on the pooled prior.")
        if self.single_campaign:
            out.append("A single campaign: no pooling across campaigns is possible; the lift interval rests "
                       "on its own data and the priors alone.")
        return out

    def to_dict(self) -> dict:
        return {"no_placebo": self.no_placebo, "zero_conversions_arm": self.zero_conversions_arm,
                "no_unexposed": self.no_unexposed, "single_campaign": self.single_campaign,
                "no_placebo_anywhere": self.no_placebo_anywhere, "messages": self.messages()}


@dataclass
class Design:
    """Index arrays over the seen/unseen rows of a counts table.

    Rows are (campaign, cell, arm, outcome).  ``pair`` indexes (campaign,
    outcome); ``stratum`` indexes (campaign, outcome, cell), the level of the
    baselines.
    """

    counts: pd.DataFrame
    campaigns: list[str]
    outcomes: list[str]
    cells: list[str]
    pair_campaign: np.ndarray
    pair_outcome: np.ndarray
    pair_is_target: np.ndarray
    stratum_pair: np.ndarray
    stratum_cell: np.ndarray
    row_stratum: np.ndarray
    row_seen: np.ndarray
    users: np.ndarray
    conversions: np.ndarray
    groups: list[str]
    campaign_group: np.ndarray
    unexposed: pd.DataFrame
    flags: CampaignFlags

    @property
    def n_campaigns(self) -> int:
        return len(self.campaigns)

    @property
    def row_pair(self) -> np.ndarray:
        return self.stratum_pair[self.row_stratum]

    @property
    def row_campaign(self) -> np.ndarray:
        return self.pair_campaign[self.row_pair]

    def pair_labels(self) -> list[str]:
        return [f"{self.campaigns[c]} | {self.outcomes[o]}" for c, o in zip(self.pair_campaign, self.pair_outcome,
                                                                             strict=True)]

    def target_pair(self) -> np.ndarray:
        """For each campaign, the index of its target (campaign, outcome) pair."""
        out = np.full(self.n_campaigns, -1)
        idx = np.flatnonzero(self.pair_is_target)
        out[self.pair_campaign[idx]] = idx
        return out


def make_design(counts: pd.DataFrame, groups: dict[str, str] | None = None) -> Design:
    """Validate a counts table and index it for the models.

    Parameters
    ----------
    counts : DataFrame
        A counts table (see :mod:`liftpool.data_prep.counts`).
    groups : dict, optional
        Campaign to group (e.g. product line), for a further pooling level.
    """
    counts = validate_counts(counts)
    ex = counts[counts["arm"].isin(["seen", "unseen"])].reset_index(drop=True)
    campaigns = sorted(ex["campaign"].unique())
    outcomes = sorted(ex["outcome"].unique())
    cells = sorted(ex["cell"].unique())
    ci = {c: i for i, c in enumerate(campaigns)}
    oi = {o: i for i, o in enumerate(outcomes)}
    ki = {k: i for i, k in enumerate(cells)}
    pairs = ex.drop_duplicates(["campaign", "outcome"])[["campaign", "outcome", "role"]].reset_index(drop=True)
    pairs = pairs.sort_values(["campaign", "outcome"]).reset_index(drop=True)
    pair_index = {(r.campaign, r.outcome): i for i, r in enumerate(pairs.itertuples())}
    strata = ex.drop_duplicates(["campaign", "outcome", "cell"])[["campaign", "outcome", "cell"]]
    strata = strata.sort_values(["campaign", "outcome", "cell"]).reset_index(drop=True)
    stratum_index = {(r.campaign, r.outcome, r.cell): i for i, r in enumerate(strata.itertuples())}
    row_stratum = np.array([stratum_index[(r.campaign, r.outcome, r.cell)] for r in ex.itertuples()])

    role = pairs.set_index(["campaign", "outcome"])["role"]
    placebo_campaigns = set(pairs.loc[pairs["role"] == "placebo", "campaign"])
    tgt = ex[ex["role"] == "target"].groupby(["campaign", "arm"])["conversions"].sum().unstack("arm").fillna(0)
    zero = sorted(c for c in campaigns if (tgt.loc[c] == 0).any()) if len(tgt) else []
    unexposed = counts[counts["arm"] == "unexposed"].reset_index(drop=True)
    flags = CampaignFlags(
        no_placebo=[c for c in campaigns if c not in placebo_campaigns],
        zero_conversions_arm=zero,
        no_unexposed=[c for c in campaigns if c not in set(unexposed["campaign"])],
        single_campaign=len(campaigns) == 1,
        no_placebo_anywhere=not placebo_campaigns,
    )
    groups = groups or {}
    group_names = sorted({groups[c] for c in campaigns if c in groups}) if groups else []
    gi = {g: i for i, g in enumerate(group_names)}
    return Design(
        counts=counts, campaigns=campaigns, outcomes=outcomes, cells=cells,
        pair_campaign=np.array([ci[c] for c in pairs["campaign"]]),
        pair_outcome=np.array([oi[o] for o in pairs["outcome"]]),
        pair_is_target=np.array([role[(c, o)] == "target" for c, o in zip(pairs["campaign"], pairs["outcome"],
                                                                           strict=True)]),
        stratum_pair=np.array([pair_index[(c, o)] for c, o in zip(strata["campaign"], strata["outcome"],
                                                                   strict=True)]),
        stratum_cell=np.array([ki[k] for k in strata["cell"]]),
        row_stratum=row_stratum,
        row_seen=(ex["arm"] == "seen").to_numpy().astype(np.int64),
        users=ex["users"].to_numpy(np.int64), conversions=ex["conversions"].to_numpy(np.int64),
        groups=group_names,
        campaign_group=np.array([gi[groups[c]] if c in groups else -1 for c in campaigns]),
        unexposed=unexposed, flags=flags,
    )
