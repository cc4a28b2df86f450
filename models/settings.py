"""Model settings: one validated registry of every prior, sampler and reporting option."""

from __future__ import annotations

import os
from dataclasses import dataclass, field, fields, replace
from typing import Any

from liftpool.data_prep.errors import ConfigError
from liftpool.data_prep.options import OptionsMixin

__all__ = ["ModelSettings", "SAMPLERS", "INITS", "PARAMETERIZATIONS", "BIAS_SIGNS", "EXCESS_MODES", "LIKELIHOODS", "DEFAULT_ACCEPT", "default_cores"]

SAMPLERS = ("pymc", "nutpie", "numpyro")
INITS = ("auto", "advi+adapt_diag", "jitter+adapt_diag")
PARAMETERIZATIONS = ("auto", "noncentered", "centered")
LIKELIHOODS = ("conditional", "binomial")
BIAS_SIGNS = ("any", "nonnegative")
#: The target's excess bias over its placebos': learned when randomized tests are given (``auto``),
#: always a model term (``on``: without tests its prior only widens the intervals), or fixed at 0.
EXCESS_MODES = ("auto", "on", "off")
#: NUTS target acceptance rate by likelihood when none is given (docs/performance.md).
DEFAULT_ACCEPT = {"conditional": 0.95, "binomial": 0.99}
#: ... and for the conditional model on a portfolio of at most this many campaigns, 0.99: there the
#: spreads are mostly prior, and their log scale is stiff on one side (validation/shapes.py: one
#: divergence in 8,000 draws in 3 of 6 such fits at 0.95, none at 0.99; docs/model.md).
SMALL_PORTFOLIO, SMALL_PORTFOLIO_ACCEPT = 3, 0.99


def default_cores() -> int:
    return max(1, min(4, os.cpu_count() or 1))


@dataclass(frozen=True)
class ModelSettings(OptionsMixin):
    """Settings of the hierarchical lift model (all scales on the log-odds scale).

    Parameters
    ----------
    chains, draws, tune : int
        NUTS chains (4 by default, run over the available cores), kept draws and tuning steps per chain.
    seed : int
        Random seed; recorded with the fit, results are reproducible.
    target_accept : float, optional
        NUTS target acceptance rate; by default (None) 0.95 for the conditional model (its sampler
        moves in the population-level parameters only, a space without funnels) and 0.99 for the
        Binomial model.  :attr:`accept` is the value used.
    sampler : {"pymc", "nutpie", "numpyro"}
        NUTS implementation (passed to PyMC as ``nuts_sampler``).
    likelihood : {"conditional", "binomial"}
        ``conditional`` (the default) conditions on each cell's total conversions, so the cell
        baselines drop out; every campaign's bias and lift are integrated out of the sampler, which
        moves only in the population-level parameters (docs/model.md).  ``binomial`` is the
        earlier reference model: it samples every cell's baseline and every campaign effect.
    init : {"auto", "advi+adapt_diag", "jitter+adapt_diag"}
        How PyMC's NUTS starts its chains.  ``auto``: the conditional model starts each chain
        from its own quick-mode draw; the Binomial model uses ADVI from 1,000 free parameters on.
        ``advi+adapt_diag`` fits a mean-field ADVI approximation first and starts from its draws;
        ``jitter+adapt_diag`` starts near the prior centres.  Ignored by the other samplers.
    advi_iterations : int
        ADVI iterations when the start uses ADVI (it stops sooner when its parameters settle).
    parameterization : {"auto", "noncentered", "centered"}
        Of the campaign-level effects.  ``auto`` (conditional model): each campaign's bias and
        target excess are partially centred by their expected information share.  ``centered``
        centres them all; ``noncentered`` is the Binomial model's default form (with ``auto``
        the Binomial model is non-centred).
    bias_sign : {"any", "nonnegative"}
        ``nonnegative`` constrains each campaign's bias to be >= 0 (seen users
        convert more for reasons other than the ad: the usual direction in this
        trade, common practice, no source).
    outcome_bias : bool
        Add a bias effect per outcome shared by every campaign using it.
    excess_bias : {"auto", "on", "off"}
        The target's own bias beyond its placebos' (``excess_mean``, ``excess_sd`` across campaigns;
        docs/model.md).  ``auto``: learned when randomized tests are given, fixed at 0 otherwise
        (without tests it cannot be told from the lift).  ``on``: a model term even without tests
        (its prior then widens every interval).  ``off``: fixed at 0; tests only pin their lifts.
    excess_mean_scale, excess_sd_scale : float
        Normal prior scale of the excess bias's mean and half-normal scale of its spread.
    lift_mean_scale, lift_sd_scale : float
        Normal prior scale of the pooled lift and half-normal scale of its spread across campaigns.
    bias_mean_scale, bias_sd_scale, residual_sd_scale, outcome_bias_sd_scale : float
        Priors of the bias terms.
    group_sd_scale : float
        Half-normal scale of the spread between campaign groups (when groups are given).
    baseline_sd_scale : float
        Half-normal scale of the spread of baselines across cells.
    level : float
        Credible-interval level of the summary (equal-tailed).
    """

    chains: int = 4
    draws: int = 2000
    tune: int = 1000
    seed: int = 20261201
    target_accept: float | None = None
    sampler: str = "pymc"
    likelihood: str = "conditional"
    init: str = "auto"
    advi_iterations: int = 20000
    parameterization: str = "noncentered"
    bias_sign: str = "any"
    outcome_bias: bool = False
    excess_bias: str = "auto"
    lift_mean_scale: float = 0.5
    lift_sd_scale: float = 0.25
    bias_mean_scale: float = 0.5
    bias_sd_scale: float = 0.25
    residual_sd_scale: float = 0.15
    outcome_bias_sd_scale: float = 0.15
    excess_mean_scale: float = 0.25
    excess_sd_scale: float = 0.1
    group_sd_scale: float = 0.25
    baseline_sd_scale: float = 1.0
    level: float = 0.9
    extra: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @property
    def accept(self) -> float:
        """The NUTS target acceptance rate used: :attr:`target_accept`, or the likelihood's default."""
        if self.target_accept is not None:
            return float(self.target_accept)
        return DEFAULT_ACCEPT[self.likelihood]

    def for_portfolio(self, n_campaigns: int) -> ModelSettings:
        """These settings with the target acceptance rate fixed for a portfolio of ``n_campaigns``
        (:data:`SMALL_PORTFOLIO_ACCEPT` for a small one when none was given)."""
        if self.target_accept is not None:
            return self
        small = self.likelihood == "conditional" and n_campaigns <= SMALL_PORTFOLIO
        return replace(self, target_accept=SMALL_PORTFOLIO_ACCEPT if small else DEFAULT_ACCEPT[self.likelihood])

    def __post_init__(self) -> None:
        if self.extra:
            raise ConfigError.unknown_keys(self.extra, self.option_names())
        if self.sampler not in SAMPLERS:
            raise ConfigError.invalid_choice("sampler", self.sampler, SAMPLERS)
        if self.init not in INITS:
            raise ConfigError.invalid_choice("init", self.init, INITS)
        if self.likelihood not in LIKELIHOODS:
            raise ConfigError.invalid_choice("likelihood", self.likelihood, LIKELIHOODS)
        if self.parameterization not in PARAMETERIZATIONS:
            raise ConfigError.invalid_choice("parameterization", self.parameterization, PARAMETERIZATIONS)
        if self.bias_sign not in BIAS_SIGNS:
            raise ConfigError.invalid_choice("bias_sign", self.bias_sign, BIAS_SIGNS)
        if self.excess_bias not in EXCESS_MODES:
            raise ConfigError.invalid_choice("excess_bias", self.excess_bias, EXCESS_MODES)
        for name in ("chains", "draws", "advi_iterations"):
            if int(getattr(self, name)) < 1:
                raise ConfigError(problem=f"'{name}' must be at least 1", fix=f"set '{name}' to a positive number")
        if self.tune < 0:
            raise ConfigError(problem="'tune' cannot be negative", fix="set tune to e.g. 1000")
        if not 0 < self.level < 1:
            raise ConfigError(problem=f"'level' must be between 0 and 1, got {self.level!r}",
                              fix="set level to e.g. 0.9 for 90% intervals")
        if self.target_accept is not None and not 0.5 <= self.target_accept < 1:
            raise ConfigError(problem="'target_accept' must be in [0.5, 1)", fix="set target_accept to e.g. 0.9")
        for f in fields(self):
            if f.name.endswith("_scale") and not getattr(self, f.name) > 0:
                raise ConfigError(problem=f"'{f.name}' must be positive", fix=f"set '{f.name}' > 0")
