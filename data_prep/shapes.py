"""Counts tables of varied shapes with a known truth (invented data, for simulations and tests only).

Every table follows one generative story, the model's own::

    cell k of pair (c, o):   baseline a ~ N(logit(rate), baseline_sd)
    unseen users convert at  logit^-1(a)
    seen users convert at    logit^-1(a + b_c + r_co + [target only] (e_c + lift_c))
    b_c ~ N(bias_mean, bias_sd),  r_co ~ N(0, residual_sd),  lift_c ~ N(lift_mean, lift_sd)
    e_c ~ N(excess_mean, excess_sd)   (the target's own bias beyond its placebos'; 0 by default)

and the shapes vary what real portfolios vary: the number of campaigns, of cells per pair and of
placebo outcomes per campaign, campaigns without placebos, placebo outcomes shared by every
campaign, sparse rates, tiny cells with no conversions in one arm.  :data:`SHAPES` is the suite the
tests and ``validation/shapes.py`` run.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

__all__ = ["Shape", "SHAPES", "shape_counts", "shape_experiments", "scaled", "COUNT_COLUMNS"]

COUNT_COLUMNS = ["campaign", "cell", "arm", "outcome", "role", "users", "conversions"]


@dataclass(frozen=True)
class Shape:
    """One portfolio shape and its true parameters (log-odds scale).

    Attributes
    ----------
    name : str
    campaigns : int
    cells : (int, int)
        Cells per (campaign, outcome) pair, drawn uniformly from this inclusive range.
    placebos : int
        Placebo outcomes per campaign.
    without_placebos : int
        How many of the campaigns have no placebo outcome.
    shared_placebos : bool
        Placebo outcomes named alike across campaigns (the same events, e.g. site-wide actions).
    users : (int, int)
        Users per (campaign, outcome) pair across its cells, log-uniform in this range.
    rate : (float, float)
        Unseen conversion rate of a cell, log-uniform in this range.
    seen_share : (float, float)
        Share of a cell's users who saw an ad.
    zero_arm : bool
        Add a tiny cell to the first campaign's target with no unseen conversions.
    excess_mean, excess_sd : float
        The target's excess bias beyond its placebos' (log odds), drawn per campaign.
    tested : int
        How many campaigns (the first ones) have a randomized test (:func:`shape_experiments`).
    test_se : float
        Each test's standard error on the log scale.
    """

    name: str
    campaigns: int = 8
    cells: tuple[int, int] = (3, 6)
    placebos: int = 3
    without_placebos: int = 0
    shared_placebos: bool = False
    users: tuple[int, int] = (20_000, 200_000)
    rate: tuple[float, float] = (0.01, 0.05)
    seen_share: tuple[float, float] = (0.3, 0.7)
    zero_arm: bool = False
    bias_mean: float = 0.25
    bias_sd: float = 0.1
    residual_sd: float = 0.05
    lift_mean: float = 0.15
    lift_sd: float = 0.1
    baseline_sd: float = 0.3
    excess_mean: float = 0.0
    excess_sd: float = 0.0
    tested: int = 0
    test_se: float = 0.05


#: The suite: every shape a held-out portfolio might have (docs/validation.md).
SHAPES = {s.name: s for s in (
    Shape("one_cell", cells=(1, 1)),
    Shape("few_cells", cells=(2, 3)),
    Shape("one_campaign", campaigns=1),
    Shape("two_campaigns", campaigns=2),
    Shape("sparse", users=(2_000, 30_000), rate=(0.001, 0.01)),
    Shape("some_without_placebos", without_placebos=3),
    Shape("shared_placebos", shared_placebos=True),
    Shape("zero_arm", zero_arm=True, campaigns=5),
    Shape("null_lift", lift_mean=0.0, lift_sd=0.0),
)}


def shape_counts(shape: Shape | str, seed: int = 0) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Draw one counts table of a shape.

    Parameters
    ----------
    shape : Shape or str
        A :class:`Shape` or a name in :data:`SHAPES`.
    seed : int

    Returns
    -------
    counts : DataFrame
        ``campaign, cell, arm, outcome, role, users, conversions``.
    truth : DataFrame
        ``campaign, lift_logodds, bias, excess`` (the true lift, placebo bias and target excess bias).
    """
    sh = SHAPES[shape] if isinstance(shape, str) else shape
    rng = np.random.default_rng(seed)
    C = sh.campaigns
    bias = rng.normal(sh.bias_mean, sh.bias_sd, C)
    lift = rng.normal(sh.lift_mean, sh.lift_sd, C)
    excess = rng.normal(sh.excess_mean, sh.excess_sd, C) if (sh.excess_mean or sh.excess_sd) else np.zeros(C)
    width = len(str(C - 1))
    names = [f"camp{c:0{width}d}" for c in range(C)]
    rows = []
    for c in range(C):
        n_pl = 0 if c >= C - sh.without_placebos else sh.placebos
        outcomes = [(f"{names[c]}_buy", "target")]
        outcomes += [((f"placebo{j}" if sh.shared_placebos else f"{names[c]}_placebo{j}"), "placebo")
                     for j in range(n_pl)]
        for out, role in outcomes:
            eff = bias[c] + rng.normal(0.0, sh.residual_sd) + (lift[c] + excess[c] if role == "target" else 0.0)
            k_n = int(rng.integers(sh.cells[0], sh.cells[1] + 1))
            total = np.exp(rng.uniform(np.log(sh.users[0]), np.log(sh.users[1])))
            share = rng.dirichlet(np.full(k_n, 2.0))
            for k in range(k_n):
                n = max(int(round(total * share[k])), 20)
                n_s = int(rng.binomial(n, rng.uniform(*sh.seen_share)))
                n_s = min(max(n_s, 1), n - 1)
                p = np.exp(rng.uniform(np.log(sh.rate[0]), np.log(sh.rate[1])))
                a = np.log(p / (1.0 - p)) + rng.normal(0.0, sh.baseline_sd)
                x_u = int(rng.binomial(n - n_s, 1.0 / (1.0 + np.exp(-a))))
                x_s = int(rng.binomial(n_s, 1.0 / (1.0 + np.exp(-(a + eff)))))
                rows += [(names[c], f"cell{k}", "seen", out, role, n_s, x_s),
                         (names[c], f"cell{k}", "unseen", out, role, n - n_s, x_u)]
            if sh.zero_arm and c == 0 and role == "target":
                rows += [(names[c], "tiny", "seen", out, role, 60, int(rng.binomial(60, 0.03))),
                         (names[c], "tiny", "unseen", out, role, 30, 0)]
    counts = pd.DataFrame(rows, columns=COUNT_COLUMNS)
    truth = pd.DataFrame({"campaign": names, "lift_logodds": lift, "bias": bias, "excess": excess})
    return counts, truth


def shape_experiments(shape: Shape | str, truth: pd.DataFrame, seed: int = 0) -> pd.DataFrame:
    """Randomized tests of the first ``shape.tested`` campaigns: each measures the true lift with error.

    The test's log lift is ``lift_logodds + N(0, test_se)``, written as a relative lift among the
    exposed (``measures = "exposed"``) with the delta-method standard error, so the tests reader's
    conversion returns exactly that log lift and ``test_se``.

    Returns
    -------
    DataFrame
        ``campaign, estimate, std_error, measures`` (the tests file's columns).
    """
    sh = SHAPES[shape] if isinstance(shape, str) else shape
    rng = np.random.default_rng(seed + 7919)
    t = truth.iloc[: sh.tested]
    y = t["lift_logodds"].to_numpy() + rng.normal(0.0, sh.test_se, len(t))
    est = np.expm1(y)
    return pd.DataFrame({"campaign": t["campaign"].to_numpy(), "estimate": est, "std_error": sh.test_se * (1.0 + est),
                         "measures": "exposed"})


def scaled(shape: Shape | str, **changes) -> Shape:
    """A shape with some fields changed (e.g. ``scaled("sparse", campaigns=200)``)."""
    sh = SHAPES[shape] if isinstance(shape, str) else shape
    return replace(sh, **changes)
