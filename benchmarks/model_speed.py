"""Model benchmarks (results in docs/performance.md).

1. counts: the Binomial (reference) counts model against the same model on per-user Bernoulli rows
   (1 million users): same posterior (the log densities differ by a constant and the
   gradients agree), and the ratio of time per gradient evaluation and per draw.
2. samplers: ESS per second of lift_mean and bias_sd for each NUTS implementation
   installed (pymc, nutpie), compile versus sampling time.
3. start (Binomial model): one chain from an ADVI start against one from PyMC's jitter start (the baseline), on
   40 campaigns x 24 cells x 6 outcomes: time and leapfrog steps in tuning and draws.
4. scale: 200 campaigns x 24 cells x 6 outcomes with the defaults: time, peak memory, checks.
5. gradient: one log-density gradient of the conditional model against the Binomial one, same data.
6. demo: the demo's full fit at the defaults.
7. quick: the quick mode on 2,000 campaigns x 24 cells x 6 outcomes.

Usage: python benchmarks/model_speed.py [counts] [samplers] [start] [scale] [gradient] [demo] [quick]
       [--draws=N --tune=N (start, scale) --campaigns=N (start, scale, gradient, quick)]
"""

from __future__ import annotations

import os

# One BLAS thread per process, as each of PyMC's chain processes gets on a 2-core machine: a
# multithreaded BLAS in a single-chain probe spins against the other process and skews the ratio.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import resource  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import arviz as az
import numpy as np
import pandas as pd

from liftpool.data_prep.shapes import Shape, shape_counts
from liftpool.models import ModelSettings, fit_counts, make_design
from liftpool.models.backend import configure_backend
from liftpool.models.hierarchical import build_model


class MemoryWatch:
    """Peak of the summed resident memory of this process and its children (the chain processes), from /proc."""

    def __init__(self, every: float = 0.5):
        import threading

        self.peak_mb, self.every, self._stop = 0.0, every, threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    @staticmethod
    def _rss_mb(pid: int) -> float:
        try:
            with open(f"/proc/{pid}/status") as fh:
                return next(float(line.split()[1]) for line in fh if line.startswith("VmRSS")) / 1024
        except (OSError, StopIteration):
            return 0.0

    def _total(self) -> float:
        me = os.getpid()
        pids = [me]
        for entry in os.listdir("/proc"):
            if entry.isdigit():
                try:
                    with open(f"/proc/{entry}/stat") as fh:
                        if int(fh.read().rsplit(")", 1)[1].split()[1]) == me:
                            pids.append(int(entry))
                except (OSError, ValueError, IndexError):
                    continue
        return sum(self._rss_mb(p) for p in pids)

    def _run(self) -> None:
        while not self._stop.wait(self.every):
            self.peak_mb = max(self.peak_mb, self._total())

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()


def bench_shape(n_campaigns, n_cells, n_outcomes, users_per_cell) -> Shape:
    """n_campaigns x n_cells x n_outcomes (one target, the rest placebos) in the shape suite's terms."""
    return Shape("bench", campaigns=n_campaigns, cells=(n_cells, n_cells), placebos=n_outcomes - 1,
                 users=(users_per_cell * n_cells, users_per_cell * n_cells), rate=(0.02, 0.04))


def synthetic_counts(n_campaigns, n_cells, n_outcomes, users_per_cell, seed=0) -> pd.DataFrame:
    """Counts of :func:`bench_shape` from the shape suite's generative story (data_prep/shapes.py;
    invented data, for measurement only)."""
    return shape_counts(bench_shape(n_campaigns, n_cells, n_outcomes, users_per_cell), seed)[0]


def expand_to_users(counts: pd.DataFrame) -> pd.DataFrame:
    """One row per user and outcome with users=1 and conversions 0/1: Binomial(1) is Bernoulli."""
    rep = counts.loc[counts.index.repeat(counts["users"])].copy()
    rank = rep.groupby(level=0).cumcount().to_numpy()
    rep["conversions"] = (rank < rep["conversions"].to_numpy()).astype(int)
    rep["users"] = 1
    rep["cell"] = rep["cell"] + "#" + rank.astype(str)  # each user its own row key
    return rep.reset_index(drop=True)


def bench_counts() -> None:
    configure_backend()
    counts = synthetic_counts(4, 6, 2, users_per_cell=42_000, seed=1)
    n_users = int(counts[counts.outcome.str.endswith("_0")]["users"].sum())
    d_counts = make_design(counts)
    # per-user design: the same strata (campaign, outcome, cell) with one likelihood row per user
    per_user = d_counts.__class__(**{**d_counts.__dict__})
    reps = d_counts.users
    per_user.row_stratum = np.repeat(d_counts.row_stratum, reps)
    per_user.row_seen = np.repeat(d_counts.row_seen, reps)
    per_user.conversions = np.concatenate([(np.arange(n) < x).astype(np.int64)
                                           for n, x in zip(reps, d_counts.conversions, strict=True)])
    per_user.users = np.ones_like(per_user.conversions)
    s = ModelSettings(seed=1, likelihood="binomial")
    m_c, m_u = build_model(d_counts, s), build_model(per_user, s)
    f_c = m_c.compile_logp(jacobian=True)
    f_u = m_u.compile_logp(jacobian=True)
    g_c, g_u = m_c.compile_dlogp(), m_u.compile_dlogp()
    rng = np.random.default_rng(0)
    ip = m_c.initial_point()
    diffs, gerr = [], []
    for _ in range(5):
        pt_ = {k: v + rng.normal(0, 0.1, np.shape(v)) for k, v in ip.items()}
        diffs.append(f_c(pt_) - f_u(pt_))
        gerr.append(np.max(np.abs(g_c(pt_) - g_u(pt_))))
    print(f"counts vs per-user rows: {len(d_counts.users):,} count rows vs {len(per_user.users):,} user rows "
          f"({n_users:,} users)")
    print(f"  log density difference at 5 random points (a constant = the log binomial coefficients): "
          f"spread {np.ptp(diffs):.2e}; max gradient difference {max(gerr):.2e}")

    def per_eval(fn, n):
        t = time.perf_counter()
        for _ in range(n):
            fn(ip)
        return (time.perf_counter() - t) / n

    tc, tu = per_eval(g_c, 2000), per_eval(g_u, 20)
    print(f"  gradient evaluation: counts {tc * 1e6:,.0f} us, per-user {tu * 1e3:,.1f} ms: ratio {tu / tc:,.0f}x")
    import pymc as pm

    # Wall time of a real sampler run with the same work per draw for both: plain HMC with a fixed
    # step size and path length (NUTS would choose different trees for the two).
    times = {}
    for name, model in (("counts", m_c), ("per-user", m_u)):
        with model:
            step = pm.HamiltonianMC(step_scale=0.05, path_length=0.8, adapt_step_size=False)
            t = time.perf_counter()
            pm.sample(draws=20, tune=0, chains=1, cores=1, step=step, random_seed=3, progressbar=False,
                      compute_convergence_checks=False)
        times[name] = time.perf_counter() - t
    print(f"  20 HMC draws (same step size and path length), 1 chain: counts {times['counts']:.2f} s, "
          f"per-user {times['per-user']:.1f} s: ratio {times['per-user'] / times['counts']:.0f}x")


def bench_samplers() -> None:
    from liftpool.data_prep import CountingRules, prepare_counts, simulate

    data = simulate(seed=20261201)
    counts = prepare_counts(data["impressions"], data["conversions"], data["outcomes"], users=data["users"],
                            rules=CountingRules()).counts
    samplers = ["pymc"]
    try:
        import nutpie  # noqa: F401

        samplers.append("nutpie")
    except ImportError:
        print("nutpie not installed (pip install nutpie): skipped")
    try:
        import numpyro  # noqa: F401

        samplers.append("numpyro")
    except ImportError:
        print("numpyro not installed (needs jax): skipped")
    base = None
    for smp in samplers:
        t = time.perf_counter()
        f = fit_counts(counts, ModelSettings(sampler=smp))
        total = time.perf_counter() - t
        samp = f.info["sampling_seconds"]
        post = f.idata.posterior
        ess = az.ess(post[["lift_mean", "bias_sd"]], method="bulk")
        e_l, e_b = float(ess["lift_mean"]), float(ess["bias_sd"])
        line = (f"{smp:8s} total {total:6.1f} s (sampling incl. compile {samp:6.1f} s)  ESS/s lift_mean "
                f"{e_l / total:6.1f}  bias_sd {e_b / total:6.1f}  divergences "
                f"{int(f.idata.sample_stats.diverging.sum())}  converged {f.converged}")
        if base is None:
            base = e_b / total
        else:
            line += f"  (bias_sd ESS/s ratio to pymc {e_b / total / base:.2f})"
        print(line, flush=True)


def bench_start(campaigns: int = 40, tune: int = 200, draws: int = 100) -> None:
    """One chain from each start on campaigns x 24 cells x 6 outcomes: time and leapfrog steps."""
    import pymc as pm

    from liftpool.models.hierarchical import build_model

    configure_backend()
    counts = synthetic_counts(campaigns, 24, 6, users_per_cell=400, seed=2)
    from liftpool.models.fit import free_parameters

    s = ModelSettings(likelihood="binomial")
    model = build_model(make_design(counts), s)
    n_free = free_parameters(model)
    print(f"start: {campaigns} campaigns x 24 cells x 6 outcomes ({n_free:,} free parameters), one chain, "
          f"{tune} tuning + {draws} draws, target_accept {s.accept}", flush=True)
    res = {}
    for init in ("jitter+adapt_diag", "advi+adapt_diag"):
        t = time.perf_counter()
        with model:
            idata = pm.sample(draws=draws, tune=tune, chains=1, cores=1, init=init, n_init=s.advi_iterations,
                              random_seed=5, nuts_sampler="pymc", target_accept=s.accept,
                              progressbar=False, compute_convergence_checks=False, discard_tuned_samples=False)
        secs = time.perf_counter() - t
        warm = idata.warmup_sample_stats["n_steps"].values.ravel()
        kept = idata.sample_stats["n_steps"].values.ravel()
        res[init] = secs
        print(f"  {init:18s}: {secs:6.1f} s (ADVI included); leapfrog steps per iteration: first half of "
              f"tuning {warm[: tune // 2].mean():5.0f}, second half {warm[tune // 2:].mean():5.0f}, draws "
              f"{kept.mean():5.0f}; divergences in draws {int(idata.sample_stats['diverging'].sum())}", flush=True)
    print(f"  time, ADVI start / jitter start: {res['advi+adapt_diag'] / res['jitter+adapt_diag']:.2f}x", flush=True)


def bench_scale(draws: int | None = None, tune: int | None = None, campaigns: int = 200, tests: int = 0) -> None:
    """campaigns x 24 cells x 6 outcomes with the default settings (or the draws and tuning given).

    With ``tests`` > 0 the first campaigns have randomized tests and every target's bias exceeds its
    placebos' by about 0.1 (data_prep/shapes.py), so the excess bias is learned.
    """
    from dataclasses import replace

    from liftpool.data_prep.experiments import check_experiments
    from liftpool.data_prep.shapes import shape_experiments
    from liftpool.models.calibration import oracle_lift

    sh = bench_shape(campaigns, 24, 6, users_per_cell=400)
    experiments = None
    if tests:
        sh = replace(sh, excess_mean=0.1, excess_sd=0.03, tested=tests, test_se=0.04)
    counts, truth = shape_counts(sh, 2)
    if tests:
        experiments = check_experiments(shape_experiments(sh, truth, 2), campaigns=list(truth.campaign))
    print(f"scale: {len(counts):,} count rows ({campaigns} campaigns x 24 cells x 6 outcomes x 2 arms)", flush=True)
    t = time.perf_counter()
    given = {k: v for k, v in (("draws", draws), ("tune", tune)) if v is not None}
    with MemoryWatch() as mem:
        f = fit_counts(counts, ModelSettings(**given), progress=lambda m: print(m, flush=True),
                       experiments=experiments)
    draws, tune = f.settings.draws, f.settings.tune
    secs = time.perf_counter() - t
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    peak_child = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    ss = f.idata.sample_stats
    post = f.idata.posterior
    n = post.sizes["chain"] * post.sizes["draw"]
    ess = az.ess(post[[v for v in ("residual_sd", "bias_sd", "lift_sd", "excess_sd") if v in post]], method="bulk")
    print(f"scale fit ({f.info['likelihood']}, {f.info['free_parameters']} sampled parameters): {tune} tuning + "
          f"{draws} draws x {f.settings.chains} chains: {secs / 60:.1f} min in all (curves {f.info.get('curve_seconds')} s, "
          f"sampling {f.info['sampling_seconds']:.0f} s, completion {f.info.get('completion_seconds')} s); "
          f"{float(ss['n_steps'].mean()):.1f} leapfrog steps per draw; bulk ESS per draw "
          + ", ".join(f"{v} {float(ess[v]) / n:.2f}" for v in ess.data_vars)
          + f"; peak memory {peak:,.0f} MB main process, {peak_child:,.0f} MB largest chain process, "
          f"{mem.peak_mb:,.0f} MB all processes together", flush=True)
    # known truth (the shape suite's 200-campaign member): 90% coverage and width against the oracle
    lift = f.table("lift_logodds")
    t = truth.set_index("campaign").loc[lift.index, "lift_logodds"]
    oracle = oracle_lift(counts, {"bias_sd": sh.bias_sd, "residual_sd": sh.residual_sd, "lift_sd": sh.lift_sd})
    inside = int(((lift["lower"] <= t) & (t <= lift["upper"])).sum())
    width = float((lift["upper"] - lift["lower"]).mean() / (oracle["upper"] - oracle["lower"]).mean())
    print(f"scale known truth: 90% lift intervals cover {inside} of {len(t)} ({inside / len(t):.1%}); "
          f"mean width {width:.2f}x the oracle's (true spreads fixed, no excess)", flush=True)
    if tests:
        em = post["excess_mean"].values.ravel()
        print(f"scale excess bias (true 0.1): median {np.median(em):.3f}, 90% interval "
              f"{np.quantile(em, 0.05):.3f} to {np.quantile(em, 0.95):.3f}; held-out tests "
              f"{f.info['heldout']['test']}", flush=True)
    print(f"held-out placebos: {f.info['heldout']['placebo']}", flush=True)
    print(f.diagnostics.render())


def bench_gradient(campaigns: int = 40) -> None:
    """Cost of one log-density gradient: the conditional (collapsed) model against the Binomial one, same data."""
    from liftpool.models.collapsed import build_collapsed_model
    from liftpool.models.conditional import build_curves, cell_tables

    configure_backend()
    counts = synthetic_counts(campaigns, 24, 6, users_per_cell=400, seed=2)
    d = make_design(counts)
    t = time.perf_counter()
    curves = build_curves(cell_tables(d), len(d.pair_campaign))
    t_curves = time.perf_counter() - t
    out = {}
    for name, model in (("binomial", build_model(d, ModelSettings(likelihood="binomial"))),
                        ("conditional", build_collapsed_model(d, curves, ModelSettings()))):
        fn = model.logp_dlogp_function(ravel_inputs=True)
        fn.set_extra_values({})
        x = np.concatenate([np.ravel(v) for v in model.initial_point().values()])
        fn(x)
        n = 0
        t = time.perf_counter()
        while time.perf_counter() - t < 3.0:
            fn(x)
            n += 1
        out[name] = ((time.perf_counter() - t) / n, x.size)
    (tb, nb), (tc, nc) = out["binomial"], out["conditional"]
    print(f"gradient, {campaigns} campaigns x 24 cells x 6 outcomes: binomial {tb * 1e3:.2f} ms ({nb:,} parameters), "
          f"conditional {tc * 1e3:.2f} ms ({nc} parameters): ratio {tc / tb:.2f}; the curves took {t_curves:.1f} s once",
          flush=True)


def bench_demo() -> None:
    """The demo's full fit at the defaults: sampling time and checks."""
    from liftpool.data_prep import CountingRules, prepare_counts, simulate

    data = simulate(seed=21, scale=0.6)
    counts = prepare_counts(data["impressions"], data["conversions"], data["outcomes"], users=data["users"],
                            rules=CountingRules(unexposed=True)).counts
    t = time.perf_counter()
    f = fit_counts(counts, ModelSettings())
    print(f"demo full fit: {time.perf_counter() - t:.1f} s in all, sampling {f.info['sampling_seconds']:.1f} s, "
          f"{f.info['free_parameters']} sampled parameters, converged {f.converged}", flush=True)
    print(f.diagnostics.render())


def bench_quick(campaigns: int = 2000) -> None:
    """The quick mode on campaigns x 24 cells x 6 outcomes."""
    counts = synthetic_counts(campaigns, 24, 6, users_per_cell=400, seed=3)
    t = time.perf_counter()
    f = fit_counts(counts, ModelSettings(), quick=True)
    secs = time.perf_counter() - t
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"quick mode, {campaigns} campaigns x 24 cells x 6 outcomes ({len(counts):,} rows): "
          f"{secs:.1f} s (curves {f.info.get('curve_seconds')} s), peak memory {peak:,.0f} MB",
          flush=True)


BENCHES = {"counts": bench_counts, "samplers": bench_samplers, "start": bench_start, "scale": bench_scale,
           "gradient": bench_gradient, "demo": bench_demo, "quick": bench_quick}

if __name__ == "__main__":
    args = sys.argv[1:]
    opts = {a.split("=")[0].lstrip("-"): int(a.split("=")[1]) for a in args if a.startswith("--")}
    which = [a for a in args if not a.startswith("--")] or list(BENCHES)
    for w in which:
        fn = BENCHES[w]
        fn(**{k: v for k, v in opts.items() if k in fn.__code__.co_varnames})
        sys.stdout.flush()
