"""Convergence diagnostics as structured results, each failure with what to do.

Thresholds: rank-normalized R-hat <= 1.01, bulk and tail ESS >= 400, no
divergent transitions after tuning (Vehtari, Gelman, Simpson, Carpenter,
Buerkner 2021, Bayesian Analysis 16(2)).
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass, field

import arviz as az
import numpy as np

__all__ = ["Check", "Diagnostics", "check_convergence", "divergence_advice", "draws_needed", "RHAT_MAX", "ESS_MIN"]

RHAT_MAX = 1.01
ESS_MIN = 400


@dataclass(frozen=True)
class Check:
    """One convergence check."""

    name: str
    passed: bool
    value: float
    threshold: float
    worst: str
    advice: str

    def line(self) -> str:
        mark = "ok  " if self.passed else "FAIL"
        return f"[{mark}] {self.name}: {self.value:.4g} (threshold {self.threshold:g}; worst: {self.worst})"


@dataclass
class Diagnostics:
    """All checks of one fit; ``converged`` is True only when every check passes."""

    checks: list[Check] = field(default_factory=list)
    method: str = "nuts"
    note: str = ""

    @property
    def converged(self) -> bool:
        return all(c.passed for c in self.checks)

    @property
    def failures(self) -> list[Check]:
        return [c for c in self.checks if not c.passed]

    def render(self) -> str:
        if not self.checks:
            return f"convergence: {self.note}"
        head = "converged" if self.converged else "NOT CONVERGED"
        lines = [f"convergence ({self.method}): {head}"] + ["  " + c.line() for c in self.checks]
        for c in self.failures:
            lines.append(f"  what to do: {c.advice}")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        return {"method": self.method, "converged": self.converged, "note": self.note,
                "checks": [asdict(c) for c in self.checks]}

    @classmethod
    def from_dict(cls, d: dict) -> Diagnostics:
        return cls(checks=[Check(**c) for c in d.get("checks", [])], method=d.get("method", "nuts"),
                   note=d.get("note", ""))


def _worst(ds, fn) -> tuple[float, str]:
    best_val, best_name = None, ""
    for name, da in ds.data_vars.items():
        vals = np.asarray(da.values, dtype=float)
        if vals.size == 0 or np.all(np.isnan(vals)):
            continue
        i = int(fn(np.nan_to_num(vals, nan=np.inf if fn is np.nanargmin else -np.inf)))
        v = float(vals.flat[i])
        if best_val is None or (fn is np.nanargmax and v > best_val) or (fn is np.nanargmin and v < best_val):
            idx = np.unravel_index(i, vals.shape) if vals.ndim else ()
            label = name
            if vals.ndim:
                dims = da.dims
                label += "[" + ", ".join(str(da[d].values[j]) for d, j in zip(dims, idx, strict=True)) + "]"
            best_val, best_name = v, label
    return (float("nan"), "-") if best_val is None else (best_val, best_name)


def draws_needed(draws: int, ess: float, target: float = ESS_MIN) -> int:
    """Draws per chain that should reach ``target`` ESS, if ESS grows in proportion to the draws.

    A 20% margin is added and the result rounded up to a hundred.  ESS of a stationary chain grows
    about linearly with its length, so this is an estimate, not a promise.
    """
    if not ess > 0:
        return 0
    return int(np.ceil(draws * target / ess * 1.2 / 100.0) * 100)


def _draws_hint(draws: int, ess: float) -> str:
    n = draws_needed(draws, ess)
    return f" (about --draws {n} per chain, from the ESS of {draws} draws)" if n > draws else ""


#: Where the model cannot be helped by the settings, the advice says what to send.
REPORT_ADVICE = ("the settings cannot fix this: please send a bug report with the fit folder's fit.json "
                 "(it holds the settings, the data sizes and these checks, no user data)")


def divergence_advice(settings) -> str:
    """What to do about divergences, given what the fit already used (never a step already taken)."""
    if settings is None:
        return "raise target_accept (--target-accept 0.95), or tighten the spread priors"
    steps = []
    ta = settings.accept
    if ta < 0.95:
        steps.append(f"raise target_accept from {ta:g} to 0.95 (--target-accept 0.95)")
    elif ta < 0.99:
        steps.append(f"raise target_accept from {ta:g} to 0.99 (--target-accept 0.99)")
    if getattr(settings, "likelihood", "conditional") == "binomial":
        steps.append("use the default conditional likelihood (--likelihood conditional)")
    if not steps:
        return f"target_accept is already {ta:g}; " + REPORT_ADVICE
    return "; or ".join(steps)


def _rhat_advice(settings, n_chains: int) -> str:
    if n_chains < 2:
        return "R-hat needs at least 2 chains: use 4 (--chains 4)"
    if settings is None:
        return "chains disagree: run more tuning and draws (--tune, --draws), or check the worst parameter"
    steps = []
    if settings.tune < 2000:
        steps.append(f"more tuning (--tune {max(2000, 2 * settings.tune)}, from {settings.tune})")
    if settings.draws < 4000:
        steps.append(f"more draws (--draws {max(4000, 2 * settings.draws)}, from {settings.draws})")
    if settings.chains < 4:
        steps.append(f"4 chains (--chains 4, from {settings.chains})")
    if not steps:
        return "chains disagree after long runs; " + REPORT_ADVICE
    return "chains disagree: " + ", ".join(steps)


def check_convergence(idata: az.InferenceData, var_names: list[str] | None = None, settings=None) -> Diagnostics:
    """Rank-normalized R-hat, bulk and tail ESS, and divergences of a NUTS fit.

    Parameters
    ----------
    idata : InferenceData
    var_names : list of str, optional
    settings : ModelSettings, optional
        The fit's own settings: the advice never repeats a step the fit already took.
    """
    post = idata.posterior
    if var_names:
        post = post[[v for v in var_names if v in post]]
    # constant quantities (e.g. a bias fixed at zero) have no R-hat or ESS: leave them out
    post = post[[v for v in post.data_vars if float(post[v].std()) > 0]]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        rhat = az.rhat(post, method="rank")
        ess_b = az.ess(post, method="bulk")
        ess_t = az.ess(post, method="tail")
    r_val, r_name = _worst(rhat, np.nanargmax)
    b_val, b_name = _worst(ess_b, np.nanargmin)
    t_val, t_name = _worst(ess_t, np.nanargmin)
    div = int(idata.sample_stats["diverging"].sum()) if "diverging" in idata.sample_stats else 0
    n_chains = post.sizes["chain"]
    checks = [
        Check("R-hat (rank-normalized)", bool(r_val <= RHAT_MAX) and n_chains > 1, r_val, RHAT_MAX, r_name,
              _rhat_advice(settings, n_chains)),
        Check("bulk ESS", bool(b_val >= ESS_MIN), b_val, ESS_MIN, b_name,
              "too few effective draws for stable means and intervals: increase --draws"
              + _draws_hint(post.sizes["draw"], b_val)),
        Check("tail ESS", bool(t_val >= ESS_MIN), t_val, ESS_MIN, t_name,
              "too few effective draws in the tails, so interval ends are unstable: increase --draws"
              + _draws_hint(post.sizes["draw"], t_val)),
        Check("divergences after tuning", div == 0, float(div), 0, f"{div} of {post.sizes['draw'] * n_chains}",
              "the sampler hit a region it cannot explore: " + divergence_advice(settings)),
    ]
    return Diagnostics(checks=checks, method="nuts")
