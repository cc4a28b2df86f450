"""Randomized tests in the model: each pins its campaign's lift, which calibrates the target's bias.

A test of campaign ``c`` measures its lift (log scale, among the exposed) with a normal error::

    y_j ~ N(lift_c, se_j^2)

Several tests of one campaign combine by inverse variance into one (``y_c, se_c``; the same
likelihood up to a constant).  The target's effect on the log odds is ``b_c + e_c + lift_c + r_c``:
the placebos' bias ``b_c``, the target's **excess bias** ``e_c ~ N(excess_mean, excess_sd)``
(what the placebos do not show), the lift and the target's own outcome residual ``r_c ~ N(0,
residual_sd)``.  Without tests the excess cannot be told from the lift, so by default it is fixed at
0 (today's model; ``excess_bias="auto"``); with tests ``uncorrected - lift`` is measured on the
tested campaigns, and the excess's mean and spread are learned and applied to every campaign.

Given the population parameters the lift's prior is ``N(centre_c, spread_c)``; a test turns it into
``N(m_c, v_c)`` (the normal-normal update, :func:`normal_update`) and contributes its marginal
density ``N(y_c | centre_c, sqrt(spread_c^2 + se_c^2))`` (:func:`evidence_loglik`).  Both the collapsed
sampler and the quick mode use these two functions (with NumPy or PyTensor arithmetic).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from liftpool.models.settings import ModelSettings

__all__ = ["CampaignTests", "campaign_tests", "lift_given_tests", "normal_update", "evidence_loglik", "excess_active"]


@dataclass(frozen=True)
class CampaignTests:
    """The tests of each campaign, combined: ``has`` (C,) 0/1, ``y`` and ``se2`` (C,) (1 where none)."""

    has: np.ndarray
    y: np.ndarray
    se2: np.ndarray

    @property
    def n_tested(self) -> int:
        return int(self.has.sum())

    def drop(self, c: int) -> CampaignTests:
        """The same tests without campaign ``c``'s (for the leave-one-test-out check)."""
        has = self.has.copy()
        has[c] = 0.0
        return CampaignTests(has, np.where(has > 0, self.y, 0.0), np.where(has > 0, self.se2, 1.0))


def campaign_tests(campaigns: list[str], tests: pd.DataFrame | None) -> CampaignTests:
    """Combine a converted tests table (:func:`liftpool.data_prep.experiments.check_experiments`) per campaign."""
    C = len(campaigns)
    has, y, se2 = np.zeros(C), np.zeros(C), np.ones(C)
    if tests is not None and len(tests):
        pos = {c: i for i, c in enumerate(campaigns)}
        for camp, g in tests.groupby("campaign", sort=False):
            w = 1.0 / g["log_lift_se"].to_numpy(float) ** 2
            i = pos[str(camp)]
            has[i] = 1.0
            y[i] = float((w * g["log_lift"].to_numpy(float)).sum() / w.sum())
            se2[i] = float(1.0 / w.sum())
    return CampaignTests(has, y, se2)


def normal_update(centre, v0, y, se2):
    """The normal-normal update of a lift ``N(centre, v0)`` by a measurement ``y ~ N(lift, se2)``: (mean, variance)."""
    k = v0 / (v0 + se2)
    return centre + k * (y - centre), v0 * (1.0 - k)


def lift_given_tests(centre, spread, t: CampaignTests):
    """The lift's prior given the campaign's tests: mean and variance, (C,) or (D, C) NumPy arrays.

    Untested campaigns keep ``N(centre, spread^2)``.
    """
    v0 = np.asarray(spread, float) ** 2
    m, v = normal_update(centre, v0, t.y, t.se2)
    tested = t.has > 0
    return np.where(tested, m, centre), np.where(tested, v, v0)


def evidence_loglik(centre, spread, t: CampaignTests, log=np.log):
    """Sum over the tested campaigns of ``log N(y_c | centre_c, sqrt(spread_c^2 + se_c^2))``.

    ``centre`` and ``spread`` are (C,) NumPy arrays or PyTensor vectors (``log=pt.log``).
    """
    idx = np.flatnonzero(t.has > 0)
    var = spread[idx] ** 2 + t.se2[idx]
    return (-0.5 * log(2.0 * np.pi * var) - 0.5 * (t.y[idx] - centre[idx]) ** 2 / var).sum()


def excess_active(s: ModelSettings, t: CampaignTests | None) -> bool:
    """Whether the target's excess bias is a model term (learned with tests; ``on`` also without)."""
    if s.excess_bias == "off":
        return False
    return s.excess_bias == "on" or (t is not None and t.n_tested > 0)
