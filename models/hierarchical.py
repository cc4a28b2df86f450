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
LARGE_VARS = ["baseline", "residual_z", "effect"]


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
    corrected = not d.flags.no_placebo_anywhere
    ts, t_camp, n_seen = target_strata(d)
    with pm.Model(coords=coords) as model:
        users = pm.Data("users", d.users, dims="row")
        seen = pm.Data("seen", d.row_seen, dims="row")

        # Baselines are data-rich (every cell has users in both arms), so they are always centered:
        # a non-centered form makes a ridge between the pair mean and the cell deviations.
        offset = _pair_offsets(d)
        baseline_sd = pm.HalfNormal("baseline_sd", s.baseline_sd_scale)
        base_pair = pm.Normal("base_pair", offset, 2.0, dims="pair")
        baseline = pm.Normal("baseline", base_pair[d.stratum_pair], baseline_sd, dims="stratum")

        lift_mean = pm.Normal("lift_mean", 0.0, s.lift_mean_scale)
        lift_sd = pm.HalfNormal("lift_sd", s.lift_sd_scale)
        center = lift_mean
        if d.groups:
            group_sd = pm.HalfNormal("group_sd", s.group_sd_scale)
            gz = pm.Normal("group_z", 0.0, 1.0, dims="group")
            g_eff = pm.Deterministic("group_effect", group_sd * gz, dims="group")
            cg = np.where(d.campaign_group >= 0, d.campaign_group, 0)
            center = lift_mean + pt.where(d.campaign_group >= 0, g_eff[cg], 0.0)
        if centered:
            lift = pm.Normal("lift_logodds", center, lift_sd, dims="campaign")
        else:
            lz = pm.Normal("lift_z", 0.0, 1.0, dims="campaign")
            lift = pm.Deterministic("lift_logodds", center + lift_sd * lz, dims="campaign")

        if corrected:
            if s.bias_sign == "nonnegative":
                bias_mean = pm.HalfNormal("bias_mean", s.bias_mean_scale)
                bias_sd = pm.HalfNormal("bias_sd", s.bias_sd_scale)
                bias = pm.TruncatedNormal("bias", mu=bias_mean, sigma=bias_sd, lower=0.0, dims="campaign")
            else:
                bias_mean = pm.Normal("bias_mean", 0.0, s.bias_mean_scale)
                bias_sd = pm.HalfNormal("bias_sd", s.bias_sd_scale)
                if centered:
                    bias = pm.Normal("bias", bias_mean, bias_sd, dims="campaign")
                else:
                    bz_c = pm.Normal("bias_z", 0.0, 1.0, dims="campaign")
                    bias = pm.Deterministic("bias", bias_mean + bias_sd * bz_c, dims="campaign")
            residual_sd = pm.HalfNormal("residual_sd", s.residual_sd_scale)
            if centered:
                residual = pm.Normal("residual", 0.0, residual_sd, dims="pair")
            else:
                rz = pm.Normal("residual_z", 0.0, 1.0, dims="pair")
                residual = pm.Deterministic("residual", residual_sd * rz, dims="pair")
            pair_bias = bias[d.pair_campaign] + residual
            if s.outcome_bias:
                ob_sd = pm.HalfNormal("outcome_bias_sd", s.outcome_bias_sd_scale)
                oz = pm.Normal("outcome_bias_z", 0.0, 1.0, dims="outcome")
                ob = pm.Deterministic("outcome_bias", ob_sd * oz, dims="outcome")
                pair_bias = pair_bias + ob[d.pair_outcome]
        else:
            pair_bias = pt.zeros(P)
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
