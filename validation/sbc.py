"""Simulation-based calibration (Talts et al. 2018, arXiv:1804.06788), the fuller run.

Two parts, results and figure in docs/validation.md:

1. the exact pooling step (normal-normal), 1000 replications;
2. the quick mode end to end: counts simulated from the quick mode's own generative story
   (a portfolio bias distribution, partially pooled lifts, Binomial counts in cells), then
   quick_fit; ranks of lift_mean, bias_mean and the first campaign's lift.

Usage: python validation/sbc.py [--reps 1000] [--quick-reps 300]
"""

from __future__ import annotations

import argparse
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from liftpool.models import ModelSettings, make_design  # noqa: E402
from liftpool.models.calibration import rank_uniformity, sbc_pooling  # noqa: E402
from liftpool.models.quick import quick_fit  # noqa: E402

OUT = Path(__file__).resolve().parents[1] / "docs" / "figures" / "sbc.png"
L = 99


def simulate_quick_prior(rng, s: ModelSettings, n_campaigns=8, n_placebos=2, n_cells=4, users=5000):
    mu_b = rng.normal(0, s.bias_mean_scale)
    sig_b = abs(rng.normal(0, np.hypot(s.bias_sd_scale, s.residual_sd_scale)))
    lm = rng.normal(0, s.lift_mean_scale)
    lsd = abs(rng.normal(0, s.lift_sd_scale))
    lift = rng.normal(lm, lsd, n_campaigns)
    rows = []
    for c in range(n_campaigns):
        for o in range(n_placebos + 1):
            target = o == 0
            eff = rng.normal(mu_b, sig_b) + (lift[c] if target else 0.0)
            for k in range(n_cells):
                b = rng.normal(-3.0, 0.3)
                xs = rng.binomial(users, 1 / (1 + np.exp(-(b + eff))))
                xu = rng.binomial(users, 1 / (1 + np.exp(-b)))
                role = "target" if target else "placebo"
                rows += [(f"c{c}", f"k{k}", "seen", f"o{c}_{o}", role, users, xs),
                         (f"c{c}", f"k{k}", "unseen", f"o{c}_{o}", role, users, xu)]
    counts = pd.DataFrame(rows, columns=["campaign", "cell", "arm", "outcome", "role", "users", "conversions"])
    return counts, {"lift_mean": lm, "bias_mean": mu_b, "lift_c0": lift[0]}


def rank(draws, truth, rng):
    d = rng.choice(np.asarray(draws).ravel(), size=L, replace=False)
    return int((d < truth).sum())


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=1000)
    ap.add_argument("--quick-reps", type=int, default=300)
    a = ap.parse_args()
    pool_ranks = sbc_pooling(n_reps=a.reps, n_draws=L, seed=2026)
    rng = np.random.default_rng(7)
    s = ModelSettings()
    q = []
    for i in range(a.quick_reps):
        counts, truth = simulate_quick_prior(rng, s)
        r = quick_fit(make_design(counts), ModelSettings(seed=i), n_draws=2000)
        q.append({"rank_lift_mean": rank(r.lift_mean, truth["lift_mean"], rng),
                  "rank_bias_mean": rank(r.bias_mean, truth["bias_mean"], rng),
                  "rank_lift_c0": rank(r.lift_logodds[:, 0], truth["lift_c0"], rng)})
    quick_ranks = pd.DataFrame(q)
    panels = [("pooling step", pool_ranks, c) for c in pool_ranks.columns] + \
             [("quick mode", quick_ranks, c) for c in quick_ranks.columns]
    fig, axes = plt.subplots(2, 3, figsize=(10, 5.5), sharey=False)
    print("SBC rank uniformity (chi-square over 10 bins):")
    for ax, (part, df, col) in zip(axes.ravel(), panels, strict=True):
        p = rank_uniformity(df[col].to_numpy(), L)
        n = len(df)
        ax.hist(df[col], bins=np.linspace(0, L + 1, 11), color="0.55", edgecolor="black")
        ax.axhline(n / 10, color="black", linestyle="--", linewidth=1)
        ax.set_title(f"{part}: {col.replace('rank_', '')}\np = {p:.2f} ({n} replications)", fontsize=9)
        ax.set_xlabel("rank of the true value among 99 posterior draws", fontsize=8)
        print(f"  {part:12s} {col:16s} p = {p:.3f}")
    fig.tight_layout()
    OUT.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(OUT, dpi=110)
    print(f"figure: {OUT}")


if __name__ == "__main__":
    main()
