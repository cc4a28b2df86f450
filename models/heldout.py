"""Held-out checks of the calibration: each randomized test, and each placebo, predicted without itself.

For a held-out item (a test's result, or a placebo's estimate) of campaign ``c``, the prediction
from everything else is, given the population parameters ``phi``, a normal: campaign ``c``'s bias
and lift ``(b, l)`` have the prior ``N(bias_mean, bias_sd) x N(centre_c, spread_c)`` and its other
observations are normal given them::

    placebo q:  z_q ~ N(b + o_q, residual_sd^2 + s_q^2)
    target:     z_t ~ N(b + l + o_t + excess_mean, residual_sd^2 + excess_sd^2 + s_t^2)
    test:       y   ~ N(l, se^2)

(each curve by its Gaussian approximation, peak ``z`` and standard error ``s``, as in the quick
mode).  Averaging over ``phi`` uses the fit's own draws re-weighted to leave the item out: the
posterior without it is the full posterior divided by the item's predictive density given ``phi``
and the campaign's other data (the integrated leave-one-out of Vehtari, Gelman & Gabry 2017,
Statistics and Computing 27; the weights Pareto-smoothed by :func:`arviz.psislw`, whose ``k``
above 0.7 marks a check the draws cannot support).  The held-out predictive is then a mixture of
normals; its central interval at ``level`` covers the item or not, and over many items the
coverage should be near ``level``.

Both checks are approximations in two ways, stated in the report: the campaign's own curves are
Gaussian, and a truncated bias (``bias_sign="nonnegative"``) is treated as untruncated here.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import special

from liftpool.models.evidence import CampaignTests

__all__ = ["heldout_checks", "HELDOUT_COLUMNS", "KHAT_LIMIT"]

#: Pareto k above which importance sampling cannot be trusted (Vehtari et al. 2017; arviz's threshold).
KHAT_LIMIT = 0.7
HELDOUT_COLUMNS = ["kind", "campaign", "item", "observed", "std_error", "lower", "median", "upper", "pit", "covered",
                   "model_lower", "model_median", "model_upper", "pareto_k"]


def _mixture_quantiles(w: np.ndarray, mu: np.ndarray, sd: np.ndarray, qs) -> list[float]:
    """Quantiles of sum_s w_s N(mu_s, sd_s) by bisection on its CDF."""
    lo = float((mu - 10 * sd).min())
    hi = float((mu + 10 * sd).max())
    out = []
    for q in qs:
        a, b = lo, hi
        for _ in range(60):
            m = 0.5 * (a + b)
            if (w * special.ndtr((m - mu) / sd)).sum() < q:
                a = m
            else:
                b = m
        out.append(0.5 * (a + b))
    return out


def _population(d, post: dict, s, D: int) -> dict:
    """Per draw: bias prior (mb, vb), lift prior centre and variance (D, C), residual and excess variances."""
    C = d.n_campaigns
    single = C == 1
    from liftpool.models.completion import lift_spread

    if single:
        centre = np.zeros((D, 1))
        spread = np.full((D, 1), float(s.lift_mean_scale))
        mb, sb = np.zeros(D), np.full(D, float(s.bias_mean_scale))
    else:
        centre = np.repeat(post["lift_mean"][:, None], C, axis=1)
        spread = (lift_spread(post["lift_sd"], post["group_sd"], d.campaign_group) if "group_sd" in post
                  else np.repeat(post["lift_sd"][:, None], C, axis=1))
        if "group_effect" in post:
            cg = np.maximum(d.campaign_group, 0)
            centre = centre + np.where(d.campaign_group >= 0, post["group_effect"][:, cg], 0.0)
        mb, sb = post["bias_mean"], post["bias_sd"]
    return {"centre": centre, "vl": spread**2, "mb": mb, "vb": sb**2, "vr": post["residual_sd"] ** 2,
            "me": post.get("excess_mean", np.zeros(D)), "ve": post.get("excess_sd", np.zeros(D)) ** 2}


def heldout_checks(d, curves, post: dict, s, tests: CampaignTests, tests_table: pd.DataFrame | None,
                   level: float, max_draws: int = 2000) -> pd.DataFrame:
    """Leave-one-test-out and leave-one-placebo-out predictions (rows of :data:`HELDOUT_COLUMNS`).

    Parameters
    ----------
    d : Design
    curves : CurveSet
    post : dict
        Flat (D,) draws of the population parameters (``residual_sd``, ``bias_mean``, ``bias_sd``,
        ``lift_mean``, ``lift_sd``, and where present ``excess_mean``, ``excess_sd``, ``group_sd``,
        ``group_effect`` (D, G), ``outcome_bias`` (D, O)).
    s : ModelSettings
    tests : CampaignTests
    tests_table : DataFrame or None
        The converted tests (for their names); a tested campaign is held out with all its tests.
    level : float

    Returns
    -------
    DataFrame
        ``kind`` is ``"test"`` (observed: the test's lift among the exposed, combined over a
        campaign's tests; its interval the predictive of that result; ``model_*`` the lift itself
        without the test, both as relative lifts) or ``"placebo"`` (log odds: the placebo's
        estimate and its predictive).  ``pit`` is the predictive CDF at the observation.
    """
    if d.flags.no_placebo_anywhere:
        return pd.DataFrame(columns=HELDOUT_COLUMNS)
    import arviz as az

    D0 = post["residual_sd"].shape[0]
    take = np.linspace(0, D0 - 1, min(max_draws, D0)).astype(int)
    post = {k: np.asarray(v)[take] for k, v in post.items() if isinstance(v, np.ndarray)}
    D = take.size
    pop = _population(d, post, s, D)
    info = np.where(curves.informative, curves.information, 0.0)
    z = curves.mode
    ob = post.get("outcome_bias")
    tp = d.target_pair()
    a = (1 - level) / 2
    rows = []
    for c in range(d.n_campaigns):
        pairs = np.flatnonzero((d.pair_campaign == c) & curves.informative)
        # observations: rows of (coefficient on b, on l, value minus offset, variance), each (D,)
        obs = []
        for p in pairs:
            o = ob[:, d.pair_outcome[p]] if ob is not None else np.zeros(D)
            s2 = 1.0 / info[p]
            if p == tp[c]:
                obs.append(("target", p, 1.0, 1.0, z[p] - o - pop["me"], pop["vr"] + pop["ve"] + s2))
            else:
                obs.append(("placebo", p, 1.0, 0.0, z[p] - o, pop["vr"] + s2))
        if tests.has[c]:
            obs.append(("test", -1, 0.0, 1.0, np.full(D, tests.y[c]), np.full(D, tests.se2[c])))
        # prior information of (b, l), then every observation's
        P = np.zeros((D, 2, 2))
        P[:, 0, 0] = 1.0 / pop["vb"]
        P[:, 1, 1] = 1.0 / pop["vl"][:, c]
        eta = np.stack([pop["mb"] / pop["vb"], pop["centre"][:, c] / pop["vl"][:, c]], -1)
        for _, _, hb, hl, val, var in obs:
            h = np.array([hb, hl])
            P += np.einsum("i,j->ij", h, h)[None] / var[:, None, None]
            eta += h[None] * (val / var)[:, None]
        for kind, p, hb, hl, val, var in obs:
            if kind == "target":
                continue
            h = np.array([hb, hl])
            Pi = P - np.einsum("i,j->ij", h, h)[None] / var[:, None, None]
            ei = eta - h[None] * (val / var)[:, None]
            V = np.linalg.inv(Pi)
            m = np.einsum("dij,dj->di", V, ei)
            mu = m @ h
            sd = np.sqrt(np.einsum("i,dij,j->d", h, V, h) + var)
            logp = -0.5 * ((val - mu) / sd) ** 2 - np.log(sd)
            lw, k = az.psislw(-logp[None, :])
            w = np.exp(np.asarray(lw).ravel())
            w /= w.sum()
            pit = float((w * special.ndtr((val - mu) / sd)).sum())
            lo, med, hi = _mixture_quantiles(w, mu, sd, [a, 0.5, 1 - a])
            row = {"kind": kind, "campaign": d.campaigns[c], "pareto_k": float(np.ravel(k)[0]), "pit": pit,
                   "covered": bool(a <= pit <= 1 - a)}
            if kind == "test":
                # the lift itself without the test, and the test's predictive, as relative lifts
                ml, sl = m[:, 1], np.sqrt(V[:, 1, 1])
                mlo, mmed, mhi = _mixture_quantiles(w, ml, sl, [a, 0.5, 1 - a])
                names = (tests_table.loc[tests_table["campaign"] == d.campaigns[c], "test"].tolist()
                         if tests_table is not None else [])
                row.update(item=" + ".join(names) or f"{d.campaigns[c]} test", observed=float(np.expm1(tests.y[c])),
                           std_error=float(np.sqrt(tests.se2[c]) * np.exp(tests.y[c])),
                           lower=float(np.expm1(lo)), median=float(np.expm1(med)), upper=float(np.expm1(hi)),
                           model_lower=float(np.expm1(mlo)), model_median=float(np.expm1(mmed)),
                           model_upper=float(np.expm1(mhi)))
            else:
                row.update(item=str(d.outcomes[d.pair_outcome[p]]), observed=float(z[p]),
                           std_error=float(np.sqrt(1.0 / info[p])), lower=lo, median=med, upper=hi,
                           model_lower=np.nan, model_median=np.nan, model_upper=np.nan)
            rows.append(row)
    return pd.DataFrame(rows, columns=HELDOUT_COLUMNS)
