"""The hierarchical lift model in PyMC.

    conversions[r] ~ Binomial(users[r], p[r])
    logit p[r]     = baseline[stratum(r)] + seen[r] * effect[pair(r)]
    effect[c, o]   = bias[c] + residual[c, o] (+ outcome_bias[o]) + [o is c's target] * lift_logodds[c]
    bias[c]        ~ Normal(bias_mean, bias_sd)           (or truncated at 0: bias_sign="nonnegative")
    residual[c, o] ~ Normal(0, residual_sd)               (also on the target: its own unknown bias)
    lift_logodds[c]~ Normal(lift_mean (+ group effect), lift_sd)
    baseline[c,o,k]~ Normal(base[c, o], baseline_sd)

Every prior and its plain-words meaning is in docs/model.md.  Derived
per-campaign quantities (relative lift among seen users, uncorrected lift,
incremental conversions) are computed inside the graph so the stored
posterior stays small even for hundreds of campaigns.
"""

from __future__ import annotations

import numpy as np
import pymc as pm
import pytensor.tensor as pt
from scipy.special import logit

from liftpool.models.design import Design
from liftpool.models.settings import ModelSettings

__all__ = ["build_model", "target_strata", "MAIN_VARS", "LARGE_VARS"]

#: Variables every summary and diagnostic looks at.
MAIN_VARS = ["lift_mean", "lift_sd", "bias_mean", "bias_sd", "residual_sd", "lift_logodds", "bias",
             "bias_target", "lift", "lift_uncorrected", "incremental_conversions"]
#: Per-stratum variables dropped from the stored posterior (they are large and only needed in-graph).
LARGE_VARS = ["baseline", "baseline_rich", "baseline_z", "residual_placebo_z", "residual_placebo_c"]
#: A stratum with at least this many conversions has its baseline sampled centered.
RICH_CONVERSIONS = 10


def _mixed_normal(model: pm.Model, name: str, mu, sd, rich: np.ndarray, dim: str):
    """Normal(mu, sd) over ``dim``: centered where ``rich`` (data pin the value), non-centered elsewhere.

    ``mu`` is a scalar or a vector over ``dim``.  The combined vector is the Deterministic ``name``.
    """
    n = len(rich)
    idx_r, idx_s = np.flatnonzero(rich), np.flatnonzero(~rich)
    mu_v = mu if getattr(mu, "ndim", 0) else pt.ones(n) * mu
    out = pt.zeros(n)
    if idx_r.size:
        model.add_coord(f"{dim}_{name}_c", idx_r)
        c = pm.Normal(f"{name}_c", mu_v[idx_r], sd, dims=f"{dim}_{name}_c")
        out = pt.set_subtensor(out[idx_r], c)
    if idx_s.size:
        model.add_coord(f"{dim}_{name}_z", idx_s)
        z = pm.Normal(f"{name}_z", 0.0, 1.0, dims=f"{dim}_{name}_z")
        out = pt.set_subtensor(out[idx_s], mu_v[idx_s] + sd * z)
    return pm.Deterministic(name, out, dims=dim)


def target_strata(d: Design) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Strata of each campaign's target: (stratum index, campaign index, seen users)."""
    tp = d.target_pair()
    is_t = np.isin(d.stratum_pair, tp)
    ts = np.flatnonzero(is_t)
    camp = d.pair_campaign[d.stratum_pair[ts]]
    seen_rows = d.row_seen == 1
    n_seen = np.zeros(len(d.stratum_pair), dtype=np.int64)
    n_seen[d.row_stratum[seen_rows]] = d.users[seen_rows]
    return ts, camp, n_seen[ts]


def _pair_offsets(d: Design) -> np.ndarray:
    """Centre of each pair's baseline prior: the logit of its unseen rate (a shift, not information)."""
    un = d.row_seen == 0
    x = np.bincount(d.row_pair[un], weights=d.conversions[un], minlength=len(d.pair_campaign))
    n = np.bincount(d.row_pair[un], weights=d.users[un], minlength=len(d.pair_campaign))
    return logit((x + 0.5) / (n + 1.0))


def build_model(d: Design, s: ModelSettings) -> pm.Model:
    """Build the PyMC model for a design.

    Parameters
    ----------
    d : Design
    s : ModelSettings

    Returns
    -------
    pymc.Model
    """
    C, P = d.n_campaigns, len(d.pair_campaign)
    coords = {
        "campaign": d.campaigns,
        "pair": d.pair_labels(),
        "stratum": np.arange(len(d.stratum_pair)),
        "row": np.arange(len(d.users)),
        "outcome": d.outcomes,
    }
    if d.groups:
        coords["group"] = d.groups
    centered = s.parameterization == "centered"
    bias_rich, lift_rich, resid_rich = np.full(C, centered), np.full(C, centered), np.full(P, centered)
    corrected = not d.flags.no_placebo_anywhere
    ts, t_camp, n_seen = target_strata(d)
    with pm.Model(coords=coords) as model:
        users = pm.Data("users", d.users, dims="row")
        seen = pm.Data("seen", d.row_seen, dims="row")

        # Baselines: each stratum's parameterization follows its own data.  A stratum with many
        # conversions is sampled centered (a non-centered form makes a ridge between the pair mean
        # and the cell deviation); a sparse one non-centered (a centered form makes a funnel with
        # baseline_sd).  With no pair split into cells there is nothing to pool: no hierarchy.
        offset = _pair_offsets(d)
        S = len(d.stratum_pair)
        if np.bincount(d.stratum_pair).max() < 2:
            baseline = pm.Normal("baseline", offset[d.stratum_pair], 2.0, dims="stratum")
        else:
            baseline_sd = pm.HalfNormal("baseline_sd", s.baseline_sd_scale)
            base_pair = pm.Normal("base_pair", offset, 2.0, dims="pair")
            x = np.bincount(d.row_stratum, weights=d.conversions, minlength=S)
            rich = np.flatnonzero(x >= RICH_CONVERSIONS)
            poor = np.flatnonzero(x < RICH_CONVERSIONS)
            model.add_coord("stratum_rich", rich)
            model.add_coord("stratum_sparse", poor)
            b_rich = pm.Normal("baseline_rich", base_pair[d.stratum_pair[rich]], baseline_sd, dims="stratum_rich")
            z = pm.Normal("baseline_z", 0.0, 1.0, dims="stratum_sparse")
            b_poor = base_pair[d.stratum_pair[poor]] + baseline_sd * z
            full = pt.zeros(S)
            full = pt.set_subtensor(full[rich], b_rich)
            full = pt.set_subtensor(full[poor], b_poor)
            baseline = pm.Deterministic("baseline", full, dims="stratum")

        single = C == 1
        if single:
            # nothing to pool: the campaign's lift gets the prior of the pooled mean directly
            center, lift_sd = 0.0, float(s.lift_mean_scale)
        else:
            lift_mean = pm.Normal("lift_mean", 0.0, s.lift_mean_scale)
            lift_sd = pm.HalfNormal("lift_sd", s.lift_sd_scale)
            center = lift_mean
            if d.groups:
                group_sd = pm.HalfNormal("group_sd", s.group_sd_scale)
                gz = pm.Normal("group_z", 0.0, 1.0, dims="group")
                g_eff = pm.Deterministic("group_effect", group_sd * gz, dims="group")
                cg = np.where(d.campaign_group >= 0, d.campaign_group, 0)
                center = lift_mean + pt.where(d.campaign_group >= 0, g_eff[cg], 0.0)

        if not corrected:
            lift = _mixed_normal(model, "lift_logodds", center, lift_sd, lift_rich, "campaign")
            pair_bias = pt.zeros(P)
        else:
            if single:
                bias = (pm.TruncatedNormal("bias", mu=0.0, sigma=s.bias_mean_scale, lower=0.0, dims="campaign")
                        if s.bias_sign == "nonnegative" else
                        pm.Normal("bias", 0.0, s.bias_mean_scale, dims="campaign"))
                residual_sd = pm.HalfNormal("residual_sd", s.residual_sd_scale)
            else:
                bias_sd = pm.HalfNormal("bias_sd", s.bias_sd_scale)
                residual_sd = pm.HalfNormal("residual_sd", s.residual_sd_scale)
                if s.bias_sign == "nonnegative":
                    bias_mean = pm.HalfNormal("bias_mean", s.bias_mean_scale)
                    bias = pm.TruncatedNormal("bias", mu=bias_mean, sigma=bias_sd, lower=0.0, dims="campaign")
                else:
                    bias_mean = pm.Normal("bias_mean", 0.0, s.bias_mean_scale)
                    bias = _mixed_normal(model, "bias", bias_mean, bias_sd, bias_rich, "campaign")
            # Placebo pairs carry their own residual.  On the target, the data see only the sum
            # lift + residual, so that sum is sampled, ~ N(center, sqrt(lift_sd^2 + residual_sd^2)),
            # and the lift is drawn from its exact conditional normal given the sum (a data-free
            # standard normal): the same model, without the ridge between lift and residual.
            pl = np.flatnonzero(~d.pair_is_target)
            tpairs = np.flatnonzero(d.pair_is_target)
            residual = pt.zeros(P)
            if pl.size:
                model.add_coord("placebo_pair", np.array(d.pair_labels())[pl])
                r_pl = _mixed_normal(model, "residual_placebo", 0.0, residual_sd, resid_rich[pl], "placebo_pair")
                residual = pt.set_subtensor(residual[pl], r_pl)
            total_sd = pt.sqrt(lift_sd**2 + residual_sd**2)
            excess = _mixed_normal(model, "target_excess", center, total_sd, lift_rich, "campaign")
            k = lift_sd**2 / total_sd**2
            split_z = pm.Normal("lift_split_z", 0.0, 1.0, dims="campaign")
            lift = pm.Deterministic("lift_logodds", center + k * (excess - center) + pt.sqrt(k) * residual_sd * split_z,
                                    dims="campaign")
            residual = pt.set_subtensor(residual[tpairs], (excess - lift)[d.pair_campaign[tpairs]])
            residual = pm.Deterministic("residual", residual, dims="pair")
            pair_bias = bias[d.pair_campaign] + residual
            if s.outcome_bias:
                ob_sd = pm.HalfNormal("outcome_bias_sd", s.outcome_bias_sd_scale)
                oz = pm.Normal("outcome_bias_z", 0.0, 1.0, dims="outcome")
                ob = pm.Deterministic("outcome_bias", ob_sd * oz, dims="outcome")
                pair_bias = pair_bias + ob[d.pair_outcome]
        effect = pm.Deterministic("effect", pair_bias + d.pair_is_target * lift[d.pair_campaign], dims="pair")
        logit_p = baseline[d.row_stratum] + seen * effect[d.row_pair]
        pm.Binomial("conversions", n=users, logit_p=logit_p, observed=d.conversions, dims="row")

        # derived, per campaign, among seen users of the target outcome
        tp = d.target_pair()
        logit_seen = baseline[ts] + effect[tp[t_camp]]
        p_seen = pm.math.sigmoid(logit_seen)
        p_without = pm.math.sigmoid(logit_seen - lift[t_camp])
        p_unseen = pm.math.sigmoid(baseline[ts])
        w = n_seen.astype(float)
        zeros = pt.zeros(C)
        e_seen = pt.inc_subtensor(zeros[t_camp], w * p_seen)
        e_without = pt.inc_subtensor(zeros[t_camp], w * p_without)
        e_unseen = pt.inc_subtensor(zeros[t_camp], w * p_unseen)
        pm.Deterministic("bias_target", pair_bias[tp], dims="campaign")
        pm.Deterministic("lift", e_seen / e_without - 1.0, dims="campaign")
        pm.Deterministic("lift_uncorrected", e_seen / e_unseen - 1.0, dims="campaign")
        pm.Deterministic("incremental_conversions", e_seen - e_without, dims="campaign")
        pm.Deterministic("counterfactual_conversions", e_without, dims="campaign")
    return model
