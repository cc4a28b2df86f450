"""Counts to posterior: fit the full model or the quick mode, save and load fits.

Only the counts table comes in; only the posterior (InferenceData) with its
summary, diagnostics and flags goes out to the reports layer.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import os
import time
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import xarray as xr

from liftpool.data_prep.errors import ConfigError, InputError
from liftpool.data_prep.io import atomic_folder, ensure_room, write_json
from liftpool.models.completion import complete_draws
from liftpool.models.conditional import build_curves, cell_tables
from liftpool.models.design import CampaignFlags, Design, make_design
from liftpool.models.diagnostics import Diagnostics, check_convergence
from liftpool.models.errors import FitError, LiftpoolWarning
from liftpool.models.estimands import USER_COUNTS, estimand_draws, summarize
from liftpool.models.evidence import campaign_tests, excess_active
from liftpool.models.gaussian import gaussian_posterior
from liftpool.models.heldout import KHAT_LIMIT, heldout_checks
from liftpool.models.quick import quick_fit, quick_relative
from liftpool.models.settings import ModelSettings, default_cores
from liftpool.models.summary import NEW_CAMPAIGN, PORTFOLIO, SUMMARY_COLUMNS, prior_lift_quantiles

__all__ = ["FitResult", "fit_counts", "load_fit", "package_versions", "choose_init", "free_parameters", "AUTO_ADVI_FROM"]

#: Draws of the quick mode.
QUICK_DRAWS = 4000
#: What the convergence checks look at: the sampled core and the reported quantities.
CHECKED_VARS = ("bias_mean", "bias_sd", "residual_sd", "lift_mean", "lift_sd", "excess_mean", "excess_sd", "group_sd",
                "outcome_bias_sd",
                "bias", "target_excess", "lift_logodds", "bias_target", "lift", "lift_uncorrected",
                "incremental_conversions")
#: ``init="auto"`` starts PyMC's NUTS from ADVI from this many free parameters on (docs/performance.md).
AUTO_ADVI_FROM = 1000


def package_versions() -> dict[str, str]:
    import importlib.metadata as md

    out = {}
    for p in ("liftpool", "pymc", "pytensor", "arviz", "numpy", "pandas", "xarray", "scipy", "duckdb"):
        try:
            out[p] = md.version(p)
        except md.PackageNotFoundError:
            out[p] = "not installed"
    return out


@dataclass
class FitResult:
    """A fitted model: posterior, tidy summary, convergence checks and data flags.

    Attributes
    ----------
    idata : arviz.InferenceData
    summary : DataFrame
        ``campaign, quantity, mean, median, lower, upper, level``.
    diagnostics : Diagnostics
    flags : CampaignFlags
    settings : ModelSettings
    mode : {"full", "quick"}
    info : dict
        Timings, backend, package versions, counts size, predictive-check summaries.
    predictive : DataFrame or None
        The posterior predictive check by (campaign, outcome, arm) (full fits).
    estimands : Dataset
        Draws of every reported quantity by unit (campaigns and pooled rows), in natural units
        (:mod:`liftpool.models.estimands`); ``summary`` is its summary at the fit's level.
    tests : DataFrame or None
        The randomized tests the fit used, converted to the lift among the exposed
        (:data:`liftpool.data_prep.experiments.TESTS_COLUMNS`).
    heldout : DataFrame or None
        Each test and each placebo predicted without itself (:mod:`liftpool.models.heldout`).
    """

    idata: az.InferenceData
    summary: pd.DataFrame
    diagnostics: Diagnostics
    flags: CampaignFlags
    settings: ModelSettings
    mode: str
    info: dict = field(default_factory=dict)
    predictive: pd.DataFrame | None = None
    estimands: xr.Dataset | None = None
    tests: pd.DataFrame | None = None
    heldout: pd.DataFrame | None = None

    def __post_init__(self) -> None:
        if self.estimands is None or not all(k in self.estimands for k in USER_COUNTS):
            # a fit saved before the estimands (or their user counts) were stored with it
            self.estimands = estimand_draws(self.idata.posterior, self.corrected, self.settings.seed,
                                            self.idata.constant_data if "constant_data" in self.idata.groups() else None)

    @property
    def level(self) -> float:
        """The interval level the fit was summarised at (the report's default)."""
        return self.settings.level

    def summarize(self, level: float | None = None) -> pd.DataFrame:
        """The tidy summary of every reported quantity at ``level`` (the fit's by default)."""
        return summarize(self.estimands, level or self.settings.level)

    @property
    def converged(self) -> bool:
        return self.diagnostics.converged

    @property
    def corrected(self) -> bool:
        return not self.flags.no_placebo_anywhere

    def table(self, quantity: str = "lift", pooled: bool = False) -> pd.DataFrame:
        """The summary rows of one quantity, indexed by campaign (with the pooled rows if ``pooled``)."""
        t = self.summary[self.summary["quantity"] == quantity]
        if not pooled:
            t = t[~t["campaign"].isin([PORTFOLIO, NEW_CAMPAIGN])]
        return t.set_index("campaign")

    def save(self, folder: str | os.PathLike) -> Path:
        """Write ``posterior.nc``, ``summary.csv`` and ``fit.json`` into a new folder, atomically.

        The folder must not exist yet (a re-fit never overwrites an earlier fit).
        """
        folder = Path(folder)
        if folder.exists() and any(folder.iterdir()):
            raise InputError(problem="the folder already holds files; a fit is never written over another",
                             file=str(folder), fix="choose a new --out folder")
        # the uncompressed size bounds the files: a full disk is refused here, not met by the HDF5 writer
        need = sum(int(self.idata[g].nbytes) for g in self.idata.groups()) + int(self.estimands.nbytes)
        ensure_room(folder, need)
        with atomic_folder(folder) as tmp:
            self.idata.to_netcdf(str(tmp / "posterior.nc"), engine="h5netcdf")
            self.summary.to_csv(tmp / "summary.csv", index=False)
            enc = {v: {"zlib": True, "complevel": 4, "fletcher32": True} for v in self.estimands.data_vars}
            self.estimands.to_netcdf(tmp / "estimands.nc", engine="h5netcdf", encoding=enc)
            if self.predictive is not None:
                self.predictive.to_csv(tmp / "predictive_check.csv", index=False)
            if self.tests is not None:
                self.tests.to_csv(tmp / "tests.csv", index=False)
            if self.heldout is not None:
                self.heldout.to_csv(tmp / "heldout_check.csv", index=False)
            write_json({"mode": self.mode, "settings": self.settings.to_dict(),
                        "diagnostics": self.diagnostics.to_dict(), "flags": self.flags.to_dict(),
                        "info": self.info}, tmp / "fit.json")
        return folder

    def render(self) -> str:
        """Plain-text result for the terminal."""
        s = self.summary
        lines = []
        if not self.converged and self.mode == "full":
            lines.append("WARNING: the fit did NOT converge; do not use these numbers for decisions.")
        q = "lift" if self.corrected else "lift_uncorrected"
        t = s[s["quantity"] == q]
        lvl = int(round(self.settings.level * 100))
        lines.append(f"{'bias-corrected' if self.corrected else 'UNCORRECTED'} lift among seen users "
                     f"(median and {lvl}% interval):")
        for r in t.itertuples():
            lines.append(f"  {r.campaign:<24s} {r.median:+8.1%}   [{r.lower:+8.1%}, {r.upper:+8.1%}]")
        post = self.idata.posterior
        if self.info.get("tests"):
            line = f"calibrated by {self.info['tests']} randomized test(s)"
            if "excess_mean" in post:
                lo, med, hi = np.quantile(post["excess_mean"].values, [(1 - self.level) / 2, 0.5, (1 + self.level) / 2])
                line += (f": the target's bias exceeds its placebos' by {med:+.3f} log odds "
                         f"[{lo:+.3f}, {hi:+.3f}], applied to every campaign")
            h = (self.info.get("heldout") or {}).get("test")
            if h and h.get("n"):
                line += f"; each test predicted without itself: {h['covered']} of {h['n']} inside"
            lines.append(line)
        lines.append(self.diagnostics.render())
        for m in self.flags.messages():
            lines.append("note: " + m)
        lines.append("This is an observational estimate, not a randomized test (see the report's cautions).")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        from html import escape

        t = self.summary
        q = "lift" if self.corrected else "lift_uncorrected"
        rows = "".join(
            f"<tr><td>{escape(str(r.campaign))}</td><td>{r.median:+.1%}</td><td>{r.lower:+.1%} to {r.upper:+.1%}</td></tr>"
            for r in t[t["quantity"] == q].itertuples())
        status = "converged" if self.converged else "<b>NOT CONVERGED</b>"
        return (f"<div><p>liftpool fit ({escape(self.mode)}; {status}; level {self.settings.level:.0%})</p>"
                f"<table><tr><th>campaign</th><th>{escape(q)} (median)</th><th>interval</th></tr>{rows}</table>"
                "<p>Observational estimate, not a randomized test.</p></div>")


def free_parameters(model) -> int:
    """Length of the unconstrained vector NUTS moves in (the model's free parameters)."""
    return int(sum(np.size(v) for v in model.initial_point().values()))


def choose_init(n_free: int, s: ModelSettings) -> str:
    """The NUTS start PyMC gets: ``s.init``, or for ``"auto"`` ADVI from :data:`AUTO_ADVI_FROM` free parameters on.

    Parameters
    ----------
    n_free : int
        Free parameters of the model (the length of the unconstrained vector NUTS moves in).
    s : ModelSettings

    Returns
    -------
    str
        ``"advi+adapt_diag"`` or ``"jitter+adapt_diag"``.
    """
    if s.init != "auto":
        return s.init
    return "advi+adapt_diag" if n_free >= AUTO_ADVI_FROM else "jitter+adapt_diag"


def load_fit(folder: str | os.PathLike) -> FitResult:
    """Load a fit saved by :meth:`FitResult.save`.

    A missing, truncated or altered file is an :class:`InputError` naming it (exit 2), never a
    traceback. ``posterior.nc`` and ``estimands.nc`` are HDF5 files with checksums on their
    compressed data, so flipped bytes there fail to load rather than load as other numbers.
    """
    folder = Path(folder)
    meta_path = folder / "fit.json"
    if not meta_path.is_file():
        raise InputError(problem="not a fit folder (no fit.json)", file=str(folder),
                         fix="give the folder written by 'liftpool fit'")

    def broken(path: Path, exc: BaseException) -> InputError:
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        return InputError(problem=f"the fit's file is missing or damaged ({first[:200]})", file=str(path),
                          fix="fit again into a new folder (an earlier fit is never changed by liftpool)")

    try:
        meta = json.loads(meta_path.read_text())
        flags_d = {k: v for k, v in meta["flags"].items() if k != "messages"}
        settings = ModelSettings.from_mapping(meta["settings"])
        diagnostics = Diagnostics.from_dict(meta["diagnostics"])
        mode = str(meta["mode"])
    except Exception as exc:  # noqa: BLE001 - any damage is bad input
        raise broken(meta_path, exc) from None
    try:
        idata = az.from_netcdf(str(folder / "posterior.nc"), engine="h5netcdf")
        if "posterior" not in idata.groups():
            raise ValueError("no posterior group")
        idata.posterior.load()
    except Exception as exc:  # noqa: BLE001
        raise broken(folder / "posterior.nc", exc) from None
    try:
        summary = pd.read_csv(folder / "summary.csv", keep_default_na=False, na_values=[""])
        missing = [c for c in SUMMARY_COLUMNS if c not in summary.columns and c != "kind"]
        if missing:
            raise ValueError(f"columns missing: {', '.join(missing)}")
    except Exception as exc:  # noqa: BLE001
        raise broken(folder / "summary.csv", exc) from None
    est_path = folder / "estimands.nc"
    estimands = None
    if est_path.is_file():
        try:
            with xr.open_dataset(est_path, engine="h5netcdf") as ds:
                estimands = ds.load()
        except Exception as exc:  # noqa: BLE001
            raise broken(est_path, exc) from None
    pc = folder / "predictive_check.csv"
    try:
        predictive = pd.read_csv(pc, keep_default_na=False, na_values=[""]) if pc.is_file() else None
        flags = CampaignFlags(**flags_d)
    except Exception as exc:  # noqa: BLE001
        raise broken(pc, exc) from None
    extra = {}
    for name, key in (("tests.csv", "tests"), ("heldout_check.csv", "heldout")):
        f = folder / name
        try:
            extra[key] = (pd.read_csv(f, keep_default_na=False, na_values=[""], dtype={"campaign": str, "test": str,
                                                                                      "item": str})
                          if f.is_file() else None)
        except Exception as exc:  # noqa: BLE001
            raise broken(f, exc) from None
    return FitResult(idata=idata, summary=summary, diagnostics=diagnostics, flags=flags, settings=settings,
                     mode=mode, info=meta.get("info", {}), predictive=predictive, estimands=estimands, **extra)


@contextlib.contextmanager
def _interrupt_watch():
    """Note a Ctrl-C during sampling: PyMC catches it and may fail or return a partial trace instead."""
    import signal
    import threading

    flag = {"hit": False}
    if threading.current_thread() is not threading.main_thread():
        yield lambda: False
        return
    # Ctrl-C, and a SIGTERM (a scheduler, `kill`): both stop the sampler's workers and end the fit
    sigs = (signal.SIGINT, signal.SIGTERM)
    previous = {sig: signal.getsignal(sig) for sig in sigs}

    def handler(signum, frame):
        flag["hit"] = True
        prev = previous[signum]
        if callable(prev) and prev not in (signal.default_int_handler,):
            prev(signum, frame)  # e.g. the command line's watchdog
        raise KeyboardInterrupt

    for sig in sigs:
        signal.signal(sig, handler)
    try:
        yield lambda: flag["hit"]
    finally:
        for sig in sigs:
            signal.signal(sig, previous[sig])


def counts_hash(counts: pd.DataFrame) -> str:
    """SHA-256 of the counts table in its canonical order (identifies the data a fit used)."""
    import hashlib

    text = counts.sort_values(["campaign", "cell", "arm", "outcome"]).to_csv(index=False)
    return hashlib.sha256(text.encode()).hexdigest()


def _add_data(idata: az.InferenceData, d: Design, curves=None) -> None:
    """Data the reports need, stored with the posterior: per campaign and per (campaign, outcome) pair.

    Each pair's estimate and standard error: its conditional curve's (Firth-penalized) peak and
    curvature when the fit used the curves, else the stratified Mantel-Haenszel estimate.
    """
    from liftpool.models.quick import stratified_estimates

    c = d.counts
    ex = c[c["arm"].isin(["seen", "unseen"])]
    cells = ex.drop_duplicates(["campaign", "cell", "arm", "outcome"])
    tgt = cells[cells["role"] == "target"]
    users = tgt.pivot_table(index="campaign", columns="arm", values="users", aggfunc="sum").reindex(d.campaigns)
    conv = tgt.pivot_table(index="campaign", columns="arm", values="conversions", aggfunc="sum").reindex(d.campaigns)
    labels = d.pair_labels()
    pc = np.array(d.campaigns)[d.pair_campaign]
    po = np.array(d.outcomes)[d.pair_outcome]
    if curves is not None:
        with np.errstate(divide="ignore"):
            se = np.where(curves.informative, 1.0 / np.sqrt(np.maximum(curves.information, 1e-300)), np.inf)
        e = pd.DataFrame({"log_or": np.where(curves.informative, curves.mode, np.nan), "se": se})
    else:
        est = stratified_estimates(c).set_index(["campaign", "outcome"])
        e = est.loc[list(zip(pc, po, strict=True))]
    ds = xr.Dataset(
        {"users_seen": ("campaign", users["seen"].fillna(0).to_numpy(np.int64)),
         "users_unseen": ("campaign", users["unseen"].fillna(0).to_numpy(np.int64)),
         "target_conversions_seen": ("campaign", conv["seen"].fillna(0).to_numpy(np.int64)),
         "target_conversions_unseen": ("campaign", conv["unseen"].fillna(0).to_numpy(np.int64)),
         "pair_campaign": ("pair", pc.astype(str)), "pair_outcome": ("pair", po.astype(str)),
         "pair_role": ("pair", np.where(d.pair_is_target, "target", "placebo").astype(str)),
         "pair_estimate": ("pair", e["log_or"].to_numpy(float)),
         "pair_std_error": ("pair", e["se"].to_numpy(float))},
        coords={"campaign": d.campaigns, "pair": labels})
    if "constant_data" in idata.groups():
        idata.constant_data = xr.merge([idata.constant_data, ds])
    else:
        idata.add_groups({"constant_data": ds})


def _naive_draws(d: Design, n_draws: int, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Exposed-versus-unexposed relative lift from Beta(1 + x, 1 + n - x) posteriors of each rate."""
    out = {}
    if d.unexposed.empty:
        return out
    c = d.counts
    for camp in d.campaigns:
        un = d.unexposed[(d.unexposed["campaign"] == camp) & (d.unexposed["role"] == "target")]
        if un.empty:
            continue
        ex = c[(c["campaign"] == camp) & (c["role"] == "target") & c["arm"].isin(["seen", "unseen"])]
        x, n = ex["conversions"].sum(), ex["users"].sum()
        xu, nu = un["conversions"].sum(), un["users"].sum()
        pe = rng.beta(1 + x, 1 + n - x, n_draws)
        pu = rng.beta(1 + xu, 1 + nu - xu, n_draws)
        out[camp] = pe / pu - 1
    return out


#: Seconds between the heartbeat lines of a long sampling run without a progress bar.
HEARTBEAT_SECONDS = 30.0


def _heartbeat(s: ModelSettings, say):
    """A PyMC callback that says how far sampling is, at most every HEARTBEAT_SECONDS (for output to a
    file, a scheduler or a notebook, where no progress bar shows)."""
    total = s.chains * (s.tune + s.draws)
    state = {"n": 0}

    def callback(trace=None, draw=None):
        state["n"] += 1
        now = time.perf_counter()
        if state["n"] == 1:  # the clock starts with the first iteration (after compiling)
            state["t0"] = state["last"] = now
            return
        if now - state["last"] >= HEARTBEAT_SECONDS:
            state["last"] = now
            done = state["n"] / total
            left = (now - state["t0"]) * (1 - done) / max(done, 1e-9)
            say(f"sampling: {state['n']:,} of {total:,} iterations ({done:.0%}), about {left:,.0f} s left")

    return callback


@contextlib.contextmanager
def _quiet_sampler_log():
    """PyMC's own lines (the sampler's parameter list, its internals) stay out of the user's output;
    liftpool says what it does in its own words. Warnings still show."""
    import logging

    lg = logging.getLogger("pymc")
    level = lg.level
    lg.setLevel(logging.WARNING)
    try:
        yield
    finally:
        lg.setLevel(level)


def _run_sampler(model, s: ModelSettings, info: dict, say, progressbar: bool, init: str, **extra) -> az.InferenceData:
    """pm.sample with the settings; a Ctrl-C or a partial trace is never a fit."""
    import pymc as pm

    def run(init: str) -> az.InferenceData:
        with model, _quiet_sampler_log():
            if "step" not in extra:  # a given step carries its own target_accept
                extra["target_accept"] = s.accept
            if not progressbar and s.sampler == "pymc":
                extra["callback"] = _heartbeat(s, say)
            return pm.sample(draws=s.draws, tune=s.tune, chains=s.chains,
                             cores=min(s.chains, default_cores()), random_seed=s.seed,
                             nuts_sampler=s.sampler, init=init,
                             n_init=s.advi_iterations, progressbar=progressbar,
                             compute_convergence_checks=False, **extra)

    with _interrupt_watch() as interrupted:
        try:
            try:
                idata = run(init)
            except FloatingPointError as exc:
                if init != "advi+adapt_diag" or interrupted():
                    raise
                # ADVI's optimisation met a NaN: start the plain way instead, and say so
                say(f"ADVI start failed ({str(exc).splitlines()[0]}); starting with jitter+adapt_diag")
                info["init_fallback"] = f"ADVI failed: {str(exc).splitlines()[0]}"
                init = "jitter+adapt_diag"
                extra.pop("initvals", None)
                idata = run(init)
        except Exception as exc:  # noqa: BLE001 - surfaced as a FitError with the cause
            if interrupted():
                raise KeyboardInterrupt("sampling was interrupted") from None
            raise FitError(f"sampling failed: {type(exc).__name__}: {exc}") from exc
        if interrupted():
            raise KeyboardInterrupt("sampling was interrupted")
    if s.sampler == "pymc":
        info["init"] = init
    got = idata.posterior.sizes
    if got["chain"] != s.chains or got["draw"] != s.draws:
        # PyMC returns what it has when interrupted; a partial trace is never a fit
        raise KeyboardInterrupt("sampling was interrupted before all draws were made")
    return idata


def _sample_binomial(d: Design, s: ModelSettings, info: dict, say, progressbar: bool, t0: float):
    """The reference model: a Binomial likelihood with every cell baseline sampled."""
    from liftpool.models.backend import configure_backend
    from liftpool.models.hierarchical import LARGE_VARS, build_model

    info["backend"] = configure_backend()
    say(f"building the Binomial model: {d.n_campaigns} campaigns, {len(d.pair_campaign)} campaign-outcome "
        f"pairs, {len(d.stratum_pair)} strata, {len(d.users)} count rows")
    model = build_model(d, s)
    n_free = free_parameters(model)
    init = choose_init(n_free, s)
    info["free_parameters"] = n_free
    say(f"sampling: {s.chains} chains x ({s.tune} tuning + {s.draws} draws), seed {s.seed}")
    idata = _run_sampler(model, s, info, say, progressbar, init)
    info["sampling_seconds"] = round(time.perf_counter() - t0, 2)
    say("checking convergence")
    free = [v.name for v in model.free_RVs]
    diag = check_convergence(idata, var_names=free + ["lift", "lift_uncorrected", "bias_target",
                                                      "incremental_conversions"], settings=s)
    from liftpool.models.predictive import posterior_predictive_check, prior_predictive_lift

    predictive = posterior_predictive_check(d, model, idata, s.level, s.seed)
    info["posterior_predictive"] = {"groups": int(len(predictive)), "inside_interval": float(predictive["inside"].mean()),
                                    "level": s.level}
    info["prior_predictive"] = prior_predictive_lift(model, s.seed)
    idata.posterior = idata.posterior.drop_vars([v for v in LARGE_VARS if v in idata.posterior])
    return idata, diag, predictive, model


def _initial_points(qcore: dict, shares, model, s: ModelSettings) -> list[dict]:
    """One start per chain: a quick-mode draw, moved into the sampler's (partially centred) variables."""
    w_b, w_x = shares
    names = {v.name for v in model.free_RVs}
    out = _population_starts(qcore, model, s)
    for c, pt_ in enumerate(out):
        i = _start_draw(c, qcore)
        mu_l = pt_.get("lift_mean", 0.0)
        if "target_excess_raw" in names:
            sd = np.sqrt(pt_.get("lift_sd", s.lift_mean_scale) ** 2 + pt_.get("residual_sd", 0.0) ** 2)
            x = qcore["target_excess"][i]
            pt_["target_excess_raw"] = w_x * mu_l + (x - mu_l) / sd ** (1.0 - w_x)
        if "bias_raw" in names:
            mu_b = pt_.get("bias_mean", 0.0)
            sd = pt_.get("bias_sd", s.bias_mean_scale)  # a single campaign: the fixed prior scale
            b = qcore["bias"][i]
            pt_["bias_raw"] = w_b * mu_b + (b - mu_b) / sd ** (1.0 - w_b)
    return out


def uses_collapsed(d: Design, s: ModelSettings) -> bool:
    """Whether the conditional model integrates the campaign effects out of the sampler.

    It does unless there is nothing population-level to sample (one campaign and no placebo).
    """
    return not (d.n_campaigns == 1 and d.flags.no_placebo_anywhere)


def _population_starts(qcore: dict, model, s: ModelSettings) -> list[dict]:
    """One start per chain for the collapsed model: a quick-mode draw of the population parameters."""
    names = {v.name for v in model.free_RVs}
    positive = {v.name for v in model.free_RVs if model.rvs_to_transforms.get(v) is not None}
    out = []
    for c in range(s.chains):
        i = _start_draw(c, qcore)
        out.append({k: (max(abs(float(qcore[k][i])), 1e-3) if k in positive else float(qcore[k][i]))
                    for k in ("bias_mean", "bias_sd", "residual_sd", "lift_mean", "lift_sd", "excess_mean", "excess_sd")
                    if k in names})
    return out


#: Pseudo-draws the quick mode's covariance counts for in the dense mass matrix's first window.
SEED_WEIGHT = 50


def _seeded_step(model, qcore: dict, s: ModelSettings):
    """NUTS with a dense mass matrix that starts from the quick mode's posterior covariance.

    The covariance is of the quick draws mapped to the sampler's unconstrained space; variables the
    quick mode does not draw (group or outcome effects) start uncorrelated with unit variance, as
    PyMC's own start does. The matrix is then adapted as usual in the tuning steps.
    """
    import pymc as pm
    from pymc.step_methods.hmc.quadpotential import QuadPotentialFullAdapt

    point = model.initial_point()
    n_draws = qcore["target_excess"].shape[0]
    cols, mean = [], []
    for value in model.value_vars:
        rv = model.values_to_rvs[value]
        size = point[value.name].size
        x = qcore.get(rv.name)
        if x is not None and np.size(x) == n_draws * size:
            x = np.asarray(x, float).reshape(n_draws, size)
            tr = model.rvs_to_transforms.get(rv)
            if tr is not None:  # a positive variable the quick mode drew unconstrained: its magnitude
                x = np.asarray(tr.forward(np.maximum(np.abs(x), 1e-6), *rv.owner.inputs).eval(), float)
            cols.append(x)
            mean.append(x.mean(axis=0))
        else:
            cols.append(None)
            mean.append(np.ravel(point[value.name]))
    start = np.cumsum([0] + [m.size for m in mean])  # each variable's slice of the flat vector
    n = int(start[-1])
    cov = np.eye(n)
    known = [i for i, c in enumerate(cols) if c is not None]
    if known:
        idx = np.concatenate([np.arange(start[i], start[i + 1]) for i in known])
        block = np.atleast_2d(np.cov(np.concatenate([cols[i] for i in known], axis=1), rowvar=False))
        block += np.eye(len(idx)) * 1e-8
        cov[np.ix_(idx, idx)] = block
    with warnings.catch_warnings():  # "experimental": in PyMC since 3.x, tested here (tests/test_shapes.py)
        warnings.filterwarnings("ignore", message="QuadPotentialFullAdapt is an experimental feature")
        potential = QuadPotentialFullAdapt(n, np.concatenate(mean), cov, SEED_WEIGHT,
                                           rng=np.random.default_rng(s.seed))
    return pm.NUTS(vars=model.value_vars, model=model, potential=potential, target_accept=s.accept)


def _start_draw(chain: int, qcore: dict) -> int:
    """The quick-mode draw chain ``chain`` starts from (spread over the draws)."""
    return (chain * 9973 + 17) % qcore["target_excess"].shape[0]


def _sample_conditional(d: Design, curves, qcore: dict, s: ModelSettings, info: dict, say, progressbar: bool,
                        t0: float, rng: np.random.Generator, tests=None):
    """The conditional-likelihood model: campaign effects integrated (or, when they cannot be, sampled)."""
    from liftpool.models.backend import configure_backend
    from liftpool.models.collapsed import POPULATION_VARS, build_collapsed_model, campaign_draws
    from liftpool.models.conditional_model import (
        CORE_VARS,
        build_conditional_model,
        information_shares,
    )

    info["backend"] = configure_backend()
    collapsed = uses_collapsed(d, s)
    if collapsed:
        model = build_collapsed_model(d, curves, s, tests)
        starts = _population_starts(qcore, model, s)
    else:
        spreads = {k: float(np.mean(qcore[k])) for k in ("bias_sd", "residual_sd", "lift_sd")}
        shares = information_shares(d, curves, spreads, s)
        model = build_conditional_model(d, curves, s, shares)
        starts = _initial_points(qcore, shares, model, s)
        info["centring"] = {"bias_mean_weight": float(np.mean(shares[0])),
                            "target_excess_mean_weight": float(np.mean(shares[1]))}
    info["sampled_effects"] = "integrated" if collapsed else "sampled"
    n_free = free_parameters(model)
    info["free_parameters"] = n_free
    say(f"sampling: {s.chains} chains x ({s.tune} tuning + {s.draws} draws), {n_free:,} parameters, seed {s.seed}")
    extra = {}
    init = s.init
    if s.sampler == "pymc" and init == "auto":
        init = "adapt_diag"
        extra["initvals"] = starts
        if collapsed:
            # a dense mass matrix seeded with the quick mode's covariance: few parameters, often correlated
            init = "adapt_full"
            extra["step"] = _seeded_step(model, qcore, s)
    idata = _run_sampler(model, s, info, say, progressbar, init, **extra)
    if "step" in extra:
        info["init"] = "adapt_full, seeded with the quick mode's covariance"
    info["sampling_seconds"] = round(time.perf_counter() - t0, 2)
    post = idata.posterior
    if collapsed:
        say("drawing each campaign's bias and excess from their conditionals")
        t1 = time.perf_counter()
        ch, dr = post.sizes["chain"], post.sizes["draw"]
        flat = {k: post[k].values.reshape((ch * dr,) + post[k].shape[2:]) for k in POPULATION_VARS if k in post}
        full = campaign_draws(d, curves, s, flat, rng, tests)
        core = {k: v.reshape((ch, dr) + v.shape[1:]) for k, v in full.items()}
        info["completion_seconds"] = round(time.perf_counter() - t1, 2)
    else:
        core = {k: post[k].values for k in CORE_VARS if k in post}
    core.update(corrected=not d.flags.no_placebo_anywhere, single=d.n_campaigns == 1,
                lift_mean_scale=s.lift_mean_scale)
    return idata, None, model, core


#: Reported per-campaign and per-pair quantities, by dimension.
_CAMPAIGN_VARS = ("lift_logodds", "bias_target", "lift", "lift_uncorrected", "incremental_conversions",
                  "counterfactual_conversions")


def _posterior_dataset(d: Design, core: dict, done: dict, chains: int, draws: int) -> xr.Dataset:
    """The stored posterior: the core draws and their completion, over (chain, draw, ...)."""
    coords = {"chain": np.arange(chains), "draw": np.arange(draws), "campaign": d.campaigns,
              "pair": d.pair_labels(), "outcome": d.outcomes}
    if d.groups:
        coords["group"] = d.groups
    data = {}
    dims_of = {"bias": ("campaign",), "target_excess": ("campaign",), "group_effect": ("group",),
               "outcome_bias": ("outcome",), "excess_bias": ("campaign",)}
    for k, v in core.items():
        if not isinstance(v, np.ndarray):
            continue
        data[k] = (("chain", "draw") + dims_of.get(k, ()), v.reshape((chains, draws) + v.shape[2:]))
    for k in _CAMPAIGN_VARS + (("excess_bias",) if "excess_bias" in done else ()):
        data[k] = (("chain", "draw", "campaign"), done[k].reshape(chains, draws, -1))
    data["effect"] = (("chain", "draw", "pair"), done["effect"].reshape(chains, draws, -1).astype(np.float32))
    return xr.Dataset(data, coords=coords)


def conditional_predictive_check(d: Design, cells, curves, post: xr.Dataset, level: float, seed: int,
                                 n_draws: int = 1000) -> pd.DataFrame:
    """Observed seen conversions of each (campaign, outcome) against their posterior predictive, given the cells' totals.

    Given a cell's margins its seen count has mean ``x1 - l'(psi)`` and variance ``-l''(psi)``
    summed over the pair's cells (the exact moments of Fisher's noncentral hypergeometric); the
    predictive total is drawn as a normal with those moments at each posterior draw of the effect.

    Returns
    -------
    DataFrame
        ``campaign, outcome, arm, observed, predicted_median, lower, upper, inside, p_value`` (arm "seen",
        conditional on each cell's total conversions).
    """
    rng = np.random.default_rng(seed)
    eff = post["effect"].values.reshape(-1, post.sizes["pair"]).astype(float)
    eff = eff[np.linspace(0, eff.shape[0] - 1, min(n_draws, eff.shape[0])).astype(int)]
    x1 = np.bincount(cells.pair[cells.informative], weights=cells.x1[cells.informative], minlength=eff.shape[1])
    lo_fixed = np.bincount(cells.pair[~cells.informative], weights=cells.x1[~cells.informative],
                           minlength=eff.shape[1])
    a = (1 - level) / 2
    rows = []
    for p in range(eff.shape[1]):
        if not curves.informative[p] or not np.all(np.isfinite(eff[:, p])):
            continue
        _, g, h = curves.evaluate(eff[:, p], np.full(eff.shape[0], p), derivatives=True)
        mean, var = x1[p] - g, np.maximum(-h, 0.0)
        sim = rng.normal(mean, np.sqrt(var)) + lo_fixed[p]
        obs = float(x1[p] + lo_fixed[p])
        lo, med, hi = np.quantile(sim, [a, 0.5, 1 - a])
        rows.append({"campaign": d.campaigns[d.pair_campaign[p]], "outcome": d.outcomes[d.pair_outcome[p]],
                     "arm": "seen", "observed": int(obs), "predicted_median": float(med), "lower": float(lo),
                     "upper": float(hi), "inside": bool(lo - 0.5 <= obs <= hi + 0.5),
                     "p_value": float(np.mean(sim >= obs))})
    return pd.DataFrame(rows, columns=["campaign", "outcome", "arm", "observed", "predicted_median", "lower",
                                       "upper", "inside", "p_value"])


def prior_predictive_lift_numpy(d: Design, s: ModelSettings, n_draws: int = 1000) -> dict:
    """What the priors alone imply for the relative lift (a check that they are weakly informative)."""
    rng = np.random.default_rng(s.seed)
    if d.n_campaigns == 1:
        lift = rng.normal(0.0, s.lift_mean_scale, (n_draws, 1))
    else:
        mu = rng.normal(0.0, s.lift_mean_scale, n_draws)
        sd = np.abs(rng.normal(0.0, s.lift_sd_scale, n_draws))
        lift = rng.normal(mu, sd)[:, None] * np.ones((1, d.n_campaigns))
    rel, _, _ = quick_relative(d, lift)
    return prior_lift_quantiles(rel)

def fit_counts(
    counts: pd.DataFrame,
    settings: ModelSettings | None = None,
    quick: bool = False,
    groups: dict[str, str] | None = None,
    progress: Callable[[str], None] | None = None,
    progressbar: bool = False,
    experiments: pd.DataFrame | None = None,
) -> FitResult:
    """Fit the hierarchical lift model (or the quick mode) to a counts table.

    Parameters
    ----------
    counts : DataFrame
        ``campaign, cell, arm, outcome, role, users, conversions``.
    settings : ModelSettings, optional
    quick : bool
        The quick mode (seconds, no sampler) instead of NUTS.
    groups : dict, optional
        Campaign to group (e.g. product line): a further level of pooling.
    progress : callable, optional
        Called with a short text before each step.
    progressbar : bool
        Show PyMC's sampling progress bar (on a terminal).
    experiments : DataFrame, optional
        Randomized tests converted to the lift among the exposed
        (:func:`liftpool.data_prep.experiments.check_experiments`): each pins its campaign's lift,
        and with them the target's excess bias over its placebos is learned (docs/model.md).

    Returns
    -------
    FitResult
    """
    s = settings or ModelSettings()
    say = progress or (lambda _m: None)
    d = make_design(counts, groups=groups)
    rng = np.random.default_rng(s.seed + 1)
    corrected = not d.flags.no_placebo_anywhere
    tests = _check_tests(d, s, experiments)
    info = {"created": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"), "versions": package_versions(),
            "campaigns": d.n_campaigns, "rows": int(len(d.users)), "strata": int(len(d.stratum_pair)),
            "pairs": int(len(d.pair_campaign)), "likelihood": s.likelihood}
    t0 = time.perf_counter()
    predictive = None
    curves = None
    heldout = None
    if quick and s.likelihood == "binomial":
        say("quick mode: stratified estimates and exact pooling")
        r = quick_fit(d, s)
        n = r.lift_logodds.shape[0]
        lift, inc, cf = quick_relative(d, r.lift_logodds)
        lift_unc, _, _ = quick_relative(d, r.lift_uncorrected_logodds)
        coords = {"chain": [0], "draw": np.arange(n), "campaign": d.campaigns}
        cd = ("chain", "draw", "campaign")
        data = {"lift_logodds": (cd, r.lift_logodds[None]), "lift_uncorrected": (cd, lift_unc[None]),
                "lift": (cd, lift[None]), "incremental_conversions": (cd, inc[None]),
                "counterfactual_conversions": (cd, cf[None]), "bias_target": (cd, r.bias[None]),
                "lift_mean": (("chain", "draw"), r.lift_mean[None]), "lift_sd": (("chain", "draw"), r.lift_sd[None])}
        if r.bias_mean is not None:
            data["bias_mean"] = (("chain", "draw"), r.bias_mean[:n][None])
            data["bias_sd"] = (("chain", "draw"), r.bias_sd[:n][None])
        idata = az.InferenceData(posterior=xr.Dataset(data, coords=coords))
        diag = Diagnostics(method="exact grid", note="quick mode: exact grid posterior with independent draws; "
                           "no sampler, so R-hat, ESS and divergences do not apply")
        info["backend"] = "numpy"
        core = None
    elif s.likelihood == "binomial":
        idata, diag, predictive, model = _sample_binomial(d, s, info, say, progressbar, t0)
        core = None
    else:
        say("conditional likelihood curves of every campaign-outcome pair")
        cells = cell_tables(d)
        curves = build_curves(cells, len(d.pair_campaign))
        info["curve_seconds"] = round(time.perf_counter() - t0, 2)
        se = np.where(curves.informative, 1.0 / np.sqrt(np.maximum(curves.information, 1e-300)), np.inf)
        n_quick = QUICK_DRAWS if quick else max(QUICK_DRAWS, s.chains * 50)
        say("quick mode: the same structure on Gaussian approximations of the curves" if quick else
            "quick-mode pass: starting points and centring weights for the sampler")
        qcore = gaussian_posterior(curves.mode, se, curves.informative, d.pair_campaign, d.target_pair(), s,
                                   n_quick, np.random.default_rng(s.seed), tests=tests)
        qcore["lift_mean_scale"] = s.lift_mean_scale
        if quick:
            core = {k: (v[None] if isinstance(v, np.ndarray) else v) for k, v in qcore.items()}
            diag = Diagnostics(method="exact grid", note="quick mode: Gaussian approximations of the curves, exact "
                               "grid posterior of the spreads, independent draws; no sampler, so R-hat, ESS and "
                               "divergences do not apply")
            info["backend"] = "numpy"
            if d.groups or s.outcome_bias or s.bias_sign != "any":
                info["quick_ignores"] = [n for n, on in (("groups", bool(d.groups)), ("outcome_bias", s.outcome_bias),
                                                         ("bias_sign", s.bias_sign != "any")) if on]
            idata = None
        else:
            s = s.for_portfolio(d.n_campaigns)  # the rate used is stored with the fit's settings
            idata, diag, model, core = _sample_conditional(d, curves, qcore, s, info, say, progressbar, t0, rng, tests)
    if core is not None:
        chains, draws = core["target_excess"].shape[:2]
        flat = {k: (v.reshape((chains * draws,) + v.shape[2:]) if isinstance(v, np.ndarray) else v)
                for k, v in core.items()}
        done = complete_draws(d, cells, curves, flat, rng, tests)
        post = _posterior_dataset(d, core, done, chains, draws)
        if idata is None:
            idata = az.InferenceData(posterior=post)
        else:
            idata.posterior = post
        if not quick:
            say("checking convergence")
            diag = check_convergence(idata, var_names=[v for v in CHECKED_VARS if v in post], settings=s)
            say("prior and posterior predictive checks")
            predictive = conditional_predictive_check(d, cells, curves, post, s.level, s.seed)
            info["posterior_predictive"] = {"groups": int(len(predictive)),
                                            "inside_interval": float(predictive["inside"].mean()),
                                            "level": s.level}
        info["prior_predictive"] = prior_predictive_lift_numpy(d, s)
        if corrected:
            say("held-out checks: each placebo and each randomized test predicted without itself")
            heldout = heldout_checks(d, curves, flat, s, tests, experiments, s.level)
            info["heldout"] = heldout_info(heldout, s.level)
    _add_data(idata, d, curves)
    info["counts_sha256"] = counts_hash(d.counts)
    post = idata.posterior
    n_draws = post.sizes["chain"] * post.sizes["draw"]
    naive = _naive_draws(d, n_draws, rng)
    if naive:
        arr = np.full((post.sizes["chain"], post.sizes["draw"], d.n_campaigns), np.nan)
        for i, c in enumerate(d.campaigns):
            if c in naive:
                arr[:, :, i] = naive[c].reshape(post.sizes["chain"], post.sizes["draw"])
        idata.posterior["lift_naive"] = (("chain", "draw", "campaign"), arr)
    est = estimand_draws(idata.posterior, corrected, s.seed, idata.constant_data)
    summary = summarize(est, s.level)
    info["seconds"] = round(time.perf_counter() - t0, 2)
    if not quick and not diag.converged:
        warnings.warn("the fit did not converge: " + "; ".join(c.name for c in diag.failures)
                      + " (see fit.diagnostics for what to do)", LiftpoolWarning, stacklevel=2)
    idata.posterior.attrs.update({"liftpool_mode": "quick" if quick else "full", "seed": s.seed,
                                  "corrected": int(corrected)})
    info["tests"] = tests.n_tested
    info["excess_bias"] = bool(corrected and excess_active(s, tests))
    return FitResult(idata=idata, summary=summary, diagnostics=diag, flags=d.flags, settings=s,
                     mode="quick" if quick else "full", info=info, predictive=predictive, estimands=est,
                     tests=experiments if tests.n_tested else None, heldout=heldout)


def heldout_info(heldout: pd.DataFrame, level: float) -> dict:
    """The held-out checks' coverage by kind (for fit.json and the report)."""
    out = {"level": level}
    for kind in ("test", "placebo"):
        h = heldout[heldout["kind"] == kind]
        out[kind] = {"n": int(len(h)), "covered": int(h["covered"].sum()),
                     "unreliable": int((h["pareto_k"] > KHAT_LIMIT).sum())}
    return out


def _check_tests(d: Design, s: ModelSettings, experiments: pd.DataFrame | None):
    """The randomized tests combined per campaign; what the model cannot use is refused (exit 2)."""
    if s.excess_bias == "on" and s.likelihood != "conditional":
        raise ConfigError(problem="the excess bias is a term of the conditional likelihood (the default), not of "
                                  f"likelihood '{s.likelihood}'", fix="leave excess_bias at 'auto' or 'off'")
    if experiments is None or len(experiments) == 0:
        return campaign_tests(d.campaigns, None)
    if s.likelihood != "conditional":
        raise ConfigError(problem="randomized tests are used by the conditional likelihood (the default), not by "
                                  f"likelihood '{s.likelihood}'",
                          fix="leave --likelihood at its default, or leave the tests out")
    if d.flags.no_placebo_anywhere:
        raise InputError(problem="randomized tests calibrate the placebo correction, and no campaign has a "
                                 "placebo outcome", fix="add placebo outcomes, or leave the tests out")
    unknown = sorted(set(experiments["campaign"].astype(str)) - set(d.campaigns))
    if unknown:
        raise InputError(problem=f"tested campaign(s) not in the counts: {', '.join(map(repr, unknown[:5]))}",
                         column="campaign", fix="test campaigns must be among the counts' campaigns")
    return campaign_tests(d.campaigns, experiments)
