"""The conditional (default) and the Binomial (reference) full models on the same counts: per-campaign
lift medians and interval ends side by side (results in docs/validation.md).

Data: the demo scenario (seed 21, 60% scale, invented) and a rich shape-suite portfolio (8 campaigns,
24 cells per pair, 3 placebos each; invented).

Usage: python validation/agreement.py
"""

from __future__ import annotations

import warnings

import numpy as np

from liftpool.data_prep import CountingRules, prepare_counts, simulate
from liftpool.data_prep.shapes import Shape, shape_counts
from liftpool.models import ModelSettings, fit_counts


def compare(name, counts):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        a = fit_counts(counts, ModelSettings())
        b = fit_counts(counts, ModelSettings(likelihood="binomial", draws=2000))
    print(f"{name}: conditional {a.info['sampling_seconds']:.0f} s sampling (converged {a.converged}), "
          f"binomial {b.info['sampling_seconds']:.0f} s (converged {b.converged})")
    for q in ("lift", "lift_logodds"):
        ta, tb = a.table(q), b.table(q).loc[a.table(q).index]
        dm = np.abs(ta["median"] - tb["median"])
        de = np.maximum(np.abs(ta["lower"] - tb["lower"]), np.abs(ta["upper"] - tb["upper"]))
        print(f"  {q}: largest median difference {dm.max():.4f} ({dm.idxmax()}), largest interval-end "
              f"difference {de.max():.4f} ({de.idxmax()})")
        for c in ta.index:
            print(f"    {c:20s} conditional {ta.loc[c, 'median']:+.3f} [{ta.loc[c, 'lower']:+.3f}, {ta.loc[c, 'upper']:+.3f}]"
                  f"  binomial {tb.loc[c, 'median']:+.3f} [{tb.loc[c, 'lower']:+.3f}, {tb.loc[c, 'upper']:+.3f}]")


if __name__ == "__main__":
    data = simulate(seed=21, scale=0.6)
    demo = prepare_counts(data["impressions"], data["conversions"], data["outcomes"], users=data["users"],
                          rules=CountingRules(unexposed=True)).counts
    compare("demo", demo)
    rich, _ = shape_counts(Shape("rich", cells=(24, 24), users=(200_000, 400_000)), seed=4)
    compare("rich", rich)
