"""The shape suite, the fuller run: the default full fit on every shape, several seeds.

For each (shape, seed): convergence (R-hat, bulk and tail ESS, divergences), sampling time, the
bulk ESS per draw of the spreads, and the known-truth coverage and mean width of the 90% lift
intervals (log odds) against an oracle (the same model with the true spreads fixed,
:func:`liftpool.models.calibration.oracle_lift`).  Results go in docs/validation.md.

Usage: python validation/shapes.py [--seeds 3] [--shapes one_cell,sparse] [--set target_accept=0.9 ...]
"""

from __future__ import annotations

import argparse
import time
import warnings

import arviz as az
import numpy as np
import pandas as pd

from liftpool.data_prep.shapes import SHAPES, shape_counts
from liftpool.models import ModelSettings, fit_counts
from liftpool.models.calibration import oracle_lift


def run_one(name: str, seed: int, s: ModelSettings) -> dict:
    sh = SHAPES[name]
    counts, truth = shape_counts(sh, seed)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = fit_counts(counts, s)
    secs = time.perf_counter() - t0
    lift = fit.table("lift_logodds")
    t = truth.set_index("campaign").loc[lift.index, "lift_logodds"]
    oracle = oracle_lift(counts, {"bias_sd": sh.bias_sd, "residual_sd": sh.residual_sd, "lift_sd": sh.lift_sd},
                         level=s.level, seed=seed).set_index("campaign")
    checks = {c.name: c.value for c in fit.diagnostics.checks}
    post = fit.idata.posterior
    ess = az.ess(post[[v for v in ("residual_sd", "bias_sd", "lift_sd") if v in post]], method="bulk")
    n = post.sizes["chain"] * post.sizes["draw"]
    row = {"shape": name, "seed": seed, "converged": fit.converged,
           "rhat": checks["R-hat (rank-normalized)"], "ess_bulk": checks["bulk ESS"],
           "ess_tail": checks["tail ESS"], "divergences": int(checks["divergences after tuning"]),
           "seconds": round(secs, 1), "sampling_seconds": fit.info.get("sampling_seconds"),
           "covered": int(((lift["lower"] <= t) & (t <= lift["upper"])).sum()), "intervals": len(t),
           "width": float((lift["upper"] - lift["lower"]).mean()),
           "oracle_width": float((oracle["upper"] - oracle["lower"]).mean())}
    for v in ess.data_vars:
        row[f"ess_per_draw_{v}"] = round(float(ess[v]) / n, 3)
    return row


def main(argv=None) -> pd.DataFrame:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--first-seed", type=int, default=1)
    ap.add_argument("--shapes", default=",".join(SHAPES))
    ap.add_argument("--set", nargs="*", default=[], help="settings overrides, e.g. target_accept=0.9")
    ap.add_argument("--out", default=None, help="write the rows to this CSV")
    a = ap.parse_args(argv)
    over = {}
    for kv in a.set:
        k, v = kv.split("=", 1)
        kind = type(getattr(ModelSettings(), k))
        if kind is type(None):  # an optional number (target_accept)
            kind = float
        over[k] = (v.lower() in ("1", "true", "yes")) if kind is bool else kind(v)
    s = ModelSettings.from_mapping(over)
    rows = []
    for name in a.shapes.split(","):
        for seed in range(a.first_seed, a.first_seed + a.seeds):
            r = run_one(name, seed, s)
            rows.append(r)
            print(" ".join(f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}" for k, v in r.items()), flush=True)
    df = pd.DataFrame(rows)
    cov = df["covered"].sum() / df["intervals"].sum()
    ratio = (df["width"] / df["oracle_width"]).mean()
    print(f"\nconverged {df['converged'].mean():.0%} of fits; coverage of 90% intervals {cov:.1%} "
          f"({df['covered'].sum()}/{df['intervals'].sum()}); mean width / oracle {ratio:.2f}; "
          f"divergences {df['divergences'].sum()}")
    if a.out:
        df.to_csv(a.out, index=False)
    return df


if __name__ == "__main__":
    np.seterr(all="ignore")
    main()
