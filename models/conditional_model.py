"""The full model on the conditional likelihood, in PyMC.

    curve_p(psi)    exact conditional log-likelihood of pair p (cell baselines conditioned away)
    placebo p of c: psi_p = b_c (+ outcome_bias_o) + r_p,   r_p ~ N(0, residual_sd)
    target of c:    psi_t = b_c (+ outcome_bias_o) + x_c,   x_c = lift_c + r_t
    b_c ~ N(bias_mean, bias_sd)
    x_c ~ N(centre_c, sqrt(lift_sd^2 + residual_sd^2)),  centre_c = lift_mean (+ group effect)

The placebo residuals are integrated out of the likelihood, pair by pair, by adaptive Gauss-Hermite
quadrature (centred and scaled by the Gaussian approximation of the integrand, so it is exact for
a Gaussian curve and accurate to about 1e-9 on the curves of sparse cells; tests/test_conditional.py).
The sampler then moves in the spreads, the means, the campaign biases and the target excesses only.
Each campaign's ``b_c`` and ``x_c`` are partially centred by their expected information share
(``b = mu + sd^(1 - w) (b~ - w mu)``, ``b~ ~ N(w mu, sd^w)``, ``w = I sd^2 / (1 + I sd^2)`` from
the quick mode's spreads): centred where data pin the value, non-centred where the prior does, and
in between for the rest, so neither the funnel nor the ridge forms (Papaspiliopoulos, Roberts &
Skold 2007, Statistical Science 22(1)).
"""

from __future__ import annotations

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from liftpool.models.collapsed import population_lift
from liftpool.models.conditional import CurveSet, curve_logp
from liftpool.models.settings import ModelSettings

__all__ = ["build_conditional_model", "information_shares", "QUADRATURE_NODES", "CORE_VARS"]

#: Gauss-Hermite nodes of the placebo-residual integral.
QUADRATURE_NODES = 9
#: Newton steps that centre the quadrature on the integrand's peak.
NEWTON_STEPS = 5
#: The sampled core every completion needs (when present).
CORE_VARS = ("bias_mean", "bias_sd", "residual_sd", "lift_mean", "lift_sd", "bias", "target_excess",
             "group_sd", "group_effect", "outcome_bias_sd", "outcome_bias")


def information_shares(design, curves: CurveSet, spreads: dict, s: ModelSettings) -> tuple[np.ndarray, np.ndarray]:
    """Centring weights of each campaign's bias and target excess from the expected information.

    ``spreads`` holds guesses of ``bias_sd, residual_sd, lift_sd`` (the quick mode's means).
    """
    C = design.n_campaigns
    tp = design.target_pair()
    info = np.where(curves.informative, curves.information, 0.0)
    sr2 = spreads["residual_sd"] ** 2
    single = C == 1
    sb2 = s.bias_mean_scale**2 if single else spreads["bias_sd"] ** 2
    tau2 = (s.lift_mean_scale**2 if single else spreads["lift_sd"] ** 2) + sr2
    pl = np.flatnonzero(~design.pair_is_target & curves.informative)
    with np.errstate(divide="ignore"):
        i_pl = np.bincount(design.pair_campaign[pl], weights=1.0 / (1.0 / info[pl] + sr2), minlength=C)
        it = info[tp]
        i_b = i_pl + np.where(it > 0, 1.0 / (1.0 / np.where(it > 0, it, 1.0) + tau2), 0.0)
        v_b = 1.0 / (i_pl + 1.0 / sb2)
        i_x = np.where(it > 0, 1.0 / (1.0 / np.where(it > 0, it, 1.0) + v_b), 0.0)
    w_b = i_b * sb2 / (1.0 + i_b * sb2)
    w_x = i_x * tau2 / (1.0 + i_x * tau2)
    if s.parameterization == "centered":
        w_b, w_x = np.ones(C), np.ones(C)
    elif s.parameterization == "noncentered":
        w_b, w_x = np.zeros(C), np.zeros(C)
    return w_b, w_x


def _partial(name, mu, sd, w, dims):
    """Normal(mu, sd) through its partially centred form with weights ``w`` (0 non-centred, 1 centred)."""
    raw = pm.Normal(f"{name}_raw", w * mu, sd**w, dims=dims)
    return pm.Deterministic(name, mu + sd ** (1.0 - w) * (raw - w * mu), dims=dims)


def _placebo_marginal(curves: CurveSet, eta, sr, pairs: np.ndarray):
    """log of the integral of exp(curve_p(eta + r)) N(r | 0, sr) dr, per placebo pair (adaptive Gauss-Hermite)."""
    x, w = np.polynomial.hermite.hermgauss(QUADRATURE_NODES)
    K = x.size
    info = pt.as_tensor(curves.information[pairs])
    mode = pt.as_tensor(curves.mode[pairs])
    prec = info + 1.0 / sr**2
    rstar = info * (mode - eta) / prec
    # Newton steps on the integrand's log from the global Gaussian guess, with the curve's own local
    # slope and curvature: the quadrature is centred and scaled where the integrand really peaks
    for _ in range(NEWTON_STEPS):
        r0 = rstar
        ll0 = curve_logp(curves, eta + r0, pairs)
        g1 = pt.grad(ll0.sum(), r0)
        g2 = pt.grad(g1.sum(), r0)
        prec = pt.maximum(-g2, 0.0) + 1.0 / sr**2
        rstar = r0 + (g1 - r0 / sr**2) / prec
    sstar = 1.0 / pt.sqrt(prec)
    r = rstar[:, None] + np.sqrt(2.0) * sstar[:, None] * x[None, :]
    psi = (eta[:, None] + r).reshape((-1,))
    ll = curve_logp(curves, psi, np.repeat(pairs, K)).reshape((pairs.size, K))
    log_prior = -0.5 * np.log(2 * np.pi) - pt.log(sr) - 0.5 * (r / sr) ** 2
    terms = np.log(w)[None, :] + (x**2)[None, :] + ll + log_prior
    return pt.logsumexp(terms, axis=1) + pt.log(np.sqrt(2.0) * sstar)


def build_conditional_model(design, curves: CurveSet, s: ModelSettings, shares: tuple[np.ndarray, np.ndarray]
                            ) -> pm.Model:
    """Build the PyMC model on the conditional likelihood.

    Parameters
    ----------
    design : Design
    curves : CurveSet
    s : ModelSettings
    shares : (ndarray, ndarray)
        Centring weights of the biases and target excesses (:func:`information_shares`).
    """
    d = design
    C = d.n_campaigns
    coords = {"campaign": d.campaigns, "outcome": d.outcomes}
    if d.groups:
        coords["group"] = d.groups
    corrected = not d.flags.no_placebo_anywhere
    single = C == 1
    w_b, w_x = shares
    tp = d.target_pair()
    pl = np.flatnonzero(~d.pair_is_target & curves.informative)
    with pm.Model(coords=coords) as model:
        centre, lift_sd = population_lift(d, s)
        if not corrected:
            x = _partial("target_excess", centre, lift_sd, w_x, "campaign")
            psi_t = x
        else:
            residual_sd = pm.HalfNormal("residual_sd", s.residual_sd_scale)
            if s.bias_sign != "any":
                raise ValueError("a truncated bias is integrated by the collapsed model (models/collapsed.py)")
            if single:
                mu_b, sd_b = 0.0, float(s.bias_mean_scale)
            else:
                sd_b = pm.HalfNormal("bias_sd", s.bias_sd_scale)
                mu_b = pm.Normal("bias_mean", 0.0, s.bias_mean_scale)
            bias = _partial("bias", pt.ones(C) * mu_b, sd_b, w_b, "campaign")
            tau = pt.sqrt(lift_sd**2 + residual_sd**2)
            x = _partial("target_excess", centre, tau, w_x, "campaign")
            eta = bias[d.pair_campaign]
            if s.outcome_bias:
                ob_sd = pm.HalfNormal("outcome_bias_sd", s.outcome_bias_sd_scale)
                oz = pm.Normal("outcome_bias_z", 0.0, 1.0, dims="outcome")
                ob = pm.Deterministic("outcome_bias", ob_sd * oz, dims="outcome")
                eta = eta + ob[d.pair_outcome]
            psi_t = eta[tp] + x
            if pl.size:
                pm.Potential("placebo_loglik", _placebo_marginal(curves, eta[pl], residual_sd, pl).sum())
        keep = curves.informative[tp]
        if keep.any():
            pm.Potential("target_loglik", curve_logp(curves, psi_t[np.flatnonzero(keep)], tp[keep]).sum())
    return model
