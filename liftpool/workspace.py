"""The workspace: a project folder that remembers inputs, settings, every fit and every report.

Layout::

    WS/liftpool.toml            inputs, prepare engine, counting rules, model and report settings (validated)
    WS/prepared/CURRENT         name of the current preparation (switched atomically)
    WS/prepared/<gen>/          counts.parquet, counts.summary.json, cache/ (exposure cells: private)
    WS/inputs/                  outcome files added with add-placebo
    WS/fits/<id>/               posterior.nc, estimands.nc, summary.csv, fit.json, manifest.json
    WS/reports/<id>/            report.html, tables.xlsx, CSVs, figures/
    WS/.lock                    held while a command works on the workspace

A re-fit never overwrites or deletes an earlier fit; every write is atomic, so an
interrupted command leaves the workspace as it was.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import fcntl
import json
import os
import re
import shutil
import tomllib
from collections.abc import Callable, Iterator
from pathlib import Path

import pandas as pd
import tomli_w

from liftpool.data_prep import ENGINES, CountingRules, PrepSummary, prepare_counts
from liftpool.data_prep.errors import ConfigError, InputError, LiftpoolError
from liftpool.data_prep.io import (
    atomic_folder,
    input_sha256,
    read_table,
    write_json,
    write_text,
)
from liftpool.models import FitResult, ModelSettings, fit_counts, load_fit
from liftpool.models.summary import PORTFOLIO

__all__ = ["Workspace", "WorkspaceBusyError", "CONFIG_NAME", "REPORT_KEYS", "INPUT_KEYS"]

CONFIG_NAME = "liftpool.toml"
SECTIONS = ("inputs", "prepare", "counting", "model", "report")
PREPARE_KEYS = ("engine", "spark_master")
#: The engines a workspace prepares with: the out-of-core ones (pandas reads whole logs into memory).
PREPARE_ENGINES = tuple(e for e in ENGINES if e != "pandas")
INPUT_KEYS = ("impressions", "conversions", "outcomes", "users", "spend", "experiments")
#: The inputs the counting reads (their hashes say whether a preparation is of the current inputs).
PREP_INPUT_KEYS = ("impressions", "conversions", "outcomes", "users", "spend")
REPORT_KEYS = ("currency", "level", "title")


class WorkspaceBusyError(LiftpoolError):
    """Another liftpool command holds the workspace."""

    exit_code = 2


def _now() -> str:
    return _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _as_list(v) -> list[str]:
    return [str(x) for x in v] if isinstance(v, list) else [str(v)]


def _private(folder: Path) -> None:
    """Owner-only permissions on a folder and everything in it (0700 folders, 0600 files)."""
    if not folder.is_dir():
        return
    os.chmod(folder, 0o700)
    for p in folder.rglob("*"):
        os.chmod(p, 0o700 if p.is_dir() else 0o600)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


@contextlib.contextmanager
def _unstage_on_failure(new_config: dict) -> Iterator[None]:
    """Remove the staged copy of new outcomes (the config's last outcomes file) when counting them fails:
    a refused add-placebo leaves the workspace as it was."""
    try:
        yield
    except BaseException:
        Path(_as_list(new_config["inputs"]["outcomes"])[-1]).unlink(missing_ok=True)
        raise


def _recover_stale_lock(path: Path, held: str, f, wait: float = 5.0) -> bool:
    """Take over a lock whose command is gone: True once the lock is ours.

    The lock names the process that took it. When that process no longer exists, the lock is held
    only by processes it left behind (a killed fit's sampler workers inherit the lock's descriptor,
    and a SIGKILL gives the fit no chance to stop them). Those processes are still holding the
    lock file open; they are stopped, and the lock is taken. A lock whose process is alive is never
    touched.
    """
    import re
    import signal
    import time

    m = re.search(r"process (\d+)", held)
    if not m or _pid_alive(int(m.group(1))):
        return False
    target = str(path.resolve())
    me = os.getpid()
    for entry in Path("/proc").glob("[0-9]*"):
        pid = int(entry.name)
        if pid == me:
            continue
        try:
            if any(os.readlink(fd) == target for fd in (entry / "fd").iterdir()):
                os.kill(pid, signal.SIGKILL)
        except OSError:
            continue
    deadline = time.monotonic() + wait
    while time.monotonic() < deadline:
        try:
            fcntl.flock(f, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return True
        except BlockingIOError:
            time.sleep(0.1)
    return False


class Workspace:
    """A workspace folder (see the module docstring)."""

    def __init__(self, path: str | os.PathLike, config: dict):
        self.path = Path(path)
        self.config = config

    # ---- creation and loading -------------------------------------------------------------
    @classmethod
    def init(cls, path, impressions, conversions, outcomes, users=None, spend=None, experiments=None, covariates=None,
             window_days=None, counting: dict | None = None, model: dict | None = None,
             report: dict | None = None, prepare: dict | None = None) -> Workspace:
        """Create a workspace that points at the input files (checked for existence, not yet validated)."""
        path = Path(path)
        if (path / CONFIG_NAME).exists():
            raise InputError(problem="a workspace already exists here", file=str(path / CONFIG_NAME),
                             fix="use it as it is, or choose a new folder")
        inputs = {"impressions": impressions, "conversions": conversions, "outcomes": outcomes, "users": users,
                  "spend": spend, "experiments": experiments}
        cfg_inputs = {}
        for k, v in inputs.items():
            if v is None:
                continue
            vals = [str(Path(x).resolve()) for x in _as_list(v)]
            for x in vals:
                if not Path(x).is_file():
                    raise InputError(problem="file not found", file=x, fix=f"check the path given for --{k}")
            cfg_inputs[k] = vals if k in ("conversions", "outcomes") else vals[0]
        counting = dict(counting or {})
        if covariates is not None:
            counting["covariates"] = list(covariates)
        if window_days is not None:
            counting["window_days"] = float(window_days)
        config = {"inputs": cfg_inputs, "counting": counting, "model": dict(model or {}),
                  # no report level by default: a report is at its fit's level unless one is set here
                  "report": {"currency": "USD", **(report or {})}}
        if prepare:
            config["prepare"] = dict(prepare)
        ws = cls(path, cls._validate(config, str(path / CONFIG_NAME)))
        path.mkdir(parents=True, exist_ok=True)
        for sub in ("prepared", "fits", "reports", "inputs"):
            (path / sub).mkdir(exist_ok=True)
        ws._write_config()
        return ws

    @classmethod
    def open(cls, path) -> Workspace:
        path = Path(path)
        cfg_path = path / CONFIG_NAME
        if not cfg_path.is_file():
            raise InputError(problem="not a liftpool workspace (no liftpool.toml)", file=str(path),
                             fix="create one with 'liftpool init WS --impressions F --conversions F --outcomes F'")
        try:
            config = tomllib.loads(cfg_path.read_text())
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(problem=f"not valid TOML: {exc}", file=str(cfg_path), fix="correct the file") from None
        return cls(path, cls._validate(config, str(cfg_path)))

    @staticmethod
    def _validate(config: dict, where: str) -> dict:
        unknown = set(config) - set(SECTIONS)
        if unknown:
            raise ConfigError.unknown_keys(unknown, SECTIONS, where)
        inputs = config.get("inputs", {})
        bad = set(inputs) - set(INPUT_KEYS)
        if bad:
            raise ConfigError.unknown_keys({f"inputs.{k}" for k in bad}, {f"inputs.{k}" for k in INPUT_KEYS}, where)
        for k in ("impressions", "conversions", "outcomes"):
            if k not in inputs:
                raise ConfigError(problem=f"'inputs.{k}' is missing", file=where, fix=f"set inputs.{k} to a file path")
        try:
            CountingRules.from_mapping(config.get("counting", {}))
            ModelSettings.from_mapping(config.get("model", {}))
        except ConfigError as exc:
            exc.file = where
            raise ConfigError(problem=exc.problem, file=where, fix=exc.fix) from None
        prep = config.get("prepare", {})
        bad = set(prep) - set(PREPARE_KEYS)
        if bad:
            raise ConfigError.unknown_keys({f"prepare.{k}" for k in bad}, {f"prepare.{k}" for k in PREPARE_KEYS},
                                           where)
        if prep.get("engine", "duckdb") not in PREPARE_ENGINES:
            err = ConfigError.invalid_choice("prepare.engine", prep.get("engine"), PREPARE_ENGINES)
            raise ConfigError(problem=err.problem, file=where, fix=err.fix)
        rep = config.get("report", {})
        bad = set(rep) - set(REPORT_KEYS)
        if bad:
            raise ConfigError.unknown_keys({f"report.{k}" for k in bad}, {f"report.{k}" for k in REPORT_KEYS}, where)
        lvl = rep.get("level", 0.9)
        if not (isinstance(lvl, (int, float)) and 0 < lvl < 1):
            raise ConfigError(problem=f"'report.level' must be between 0 and 1, got {lvl!r}", file=where,
                              fix="set report.level = 0.9")
        config.setdefault("counting", {})
        config.setdefault("model", {})
        config.setdefault("report", {})
        return config

    def _write_config(self) -> None:
        text = ("# liftpool workspace: inputs, counting rules, model and report settings.\n"
                "# Valid keys are listed in docs/workspace.md; unknown keys are an error.\n"
                + tomli_w.dumps(self.config))
        write_text(text, self.path / CONFIG_NAME)

    # ---- locking ---------------------------------------------------------------------------------
    @contextlib.contextmanager
    def lock(self, what: str) -> Iterator[None]:
        """Hold the workspace for one command; a second concurrent command is refused."""
        f = open(self.path / ".lock", "a+")  # noqa: SIM115 - held for the duration
        try:
            try:
                fcntl.flock(f, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                f.seek(0)
                held = f.read().strip() or "another command"
                if not _recover_stale_lock(self.path / ".lock", held, f):
                    raise WorkspaceBusyError(
                        f"{self.path}: the workspace is busy ({held}); wait for that command to finish, then run "
                        "this one again") from None
            f.seek(0)
            f.truncate()
            f.write(f"{what}, process {os.getpid()}, since {_now()}")
            f.flush()
            yield
        finally:
            with contextlib.suppress(OSError):
                f.seek(0)
                f.truncate()
            f.close()

    # ---- settings --------------------------------------------------------------------------------
    @property
    def rules(self) -> CountingRules:
        return CountingRules.from_mapping(self.config.get("counting", {}))

    def settings(self, **overrides) -> ModelSettings:
        return ModelSettings.from_mapping({**self.config.get("model", {}),
                                           **{k: v for k, v in overrides.items() if v is not None}})

    def _inputs(self, config: dict | None = None) -> dict:
        i = (config or self.config)["inputs"]
        outcomes = pd.concat([read_table(p) for p in _as_list(i["outcomes"])], ignore_index=True)
        return {"impressions": i["impressions"], "conversions": _as_list(i["conversions"]),
                "outcomes": outcomes, "users": i.get("users"), "spend": i.get("spend")}

    # ---- commands ------------------------------------------------------------------------------
    def check(self, progress: Callable[[str], None] | None = None) -> tuple[dict, list[str]]:
        """Validate every input (no counting); returns rows per input and the inputs' warnings."""
        from liftpool.data_prep.rules import BUILTIN_COVARIATES
        from liftpool.data_prep.sources import open_inputs

        inp = self._inputs()
        covs = tuple(c for c in self.rules.covariates if c not in BUILTIN_COVARIATES)
        (progress or (lambda _m: None))("checking inputs")
        opened = open_inputs(inp["impressions"], inp["conversions"], inp["outcomes"], users=inp["users"],
                             spend=inp["spend"], covariates=covs, large_ad_pixels=self.rules.large_ad_pixels)
        rows = {k: t.n_rows for k, t in opened.tables.items()}
        if self.config["inputs"].get("experiments"):
            rows["experiments"] = len(self.experiments())
        return rows, opened.warnings

    def experiments(self, path: str | None = None, counts: pd.DataFrame | None = None) -> pd.DataFrame | None:
        """The randomized tests (``path``, or the workspace's ``inputs.experiments``), converted; None without.

        Their campaigns are checked against ``counts`` (by default the current counts, when prepared).
        """
        from liftpool.data_prep.experiments import read_experiments

        path = path or self.config["inputs"].get("experiments")
        if not path:
            return None
        if counts is None and self.current() is not None:
            counts = pd.read_parquet(self.current() / "counts.parquet", columns=["campaign"])
        camps = sorted(counts["campaign"].astype(str).unique()) if counts is not None else None
        return read_experiments(path, campaigns=camps)

    def current(self) -> Path | None:
        cur = self.path / "prepared" / "CURRENT"
        if not cur.is_file():
            return None
        name = cur.read_text().strip()
        if not re.fullmatch(r"gen-\d{3,}", name):  # never a path: "../x" must not read outside the workspace
            raise InputError(problem=f"prepared/CURRENT names {name[:60]!r}, not a preparation (gen-NNN)",
                             file=str(cur), fix=f"write the name of a folder in {self.path / 'prepared'} into it, "
                                                f"or run 'liftpool prepare {self.path}' again")
        gen = self.path / "prepared" / name
        return gen if gen.is_dir() else None

    def counts(self) -> pd.DataFrame:
        gen = self.current()
        if gen is None:
            raise InputError(problem="the workspace has no prepared counts yet", file=str(self.path),
                             fix=f"run 'liftpool prepare {self.path}' first")
        return pd.read_parquet(gen / "counts.parquet")

    def prep_summary(self) -> PrepSummary | None:
        gen = self.current()
        if gen is None:
            return None
        return PrepSummary.from_dict(json.loads((gen / "counts.summary.json").read_text()))

    def _build_generation(self, build: Callable[[Path], None]) -> str:
        """Build a preparation in a staging folder and move it into place (not yet current)."""
        prepared = self.path / "prepared"
        prepared.mkdir(exist_ok=True)
        nums = [int(p.name.split("-")[1]) for p in prepared.glob("gen-*") if p.name.split("-")[1].isdigit()]
        name = f"gen-{1 + max(nums, default=0):03d}"
        with atomic_folder(prepared / name) as tmp:
            build(tmp)
            _private(tmp / "cache")  # the exposure cache holds user ids: owner only
        return name

    def _switch(self, name: str) -> Path:
        """Make a built preparation current (one atomic rename); drop the old one's private cache."""
        old = self.current()
        write_text(name + "\n", self.path / "prepared" / "CURRENT")
        if old is not None and old.name != name:
            shutil.rmtree(old / "cache", ignore_errors=True)  # old counts stay for history
        return self.path / "prepared" / name

    @property
    def engine(self) -> str:
        """The counting engine of ``prepare`` (``[prepare] engine``: duckdb by default, or spark)."""
        return self.config.get("prepare", {}).get("engine", "duckdb")

    def _engine_kwargs(self, tmp: Path) -> dict:
        if self.engine == "spark":
            from liftpool.data_prep.engine_spark import spark_session

            master = self.config.get("prepare", {}).get("spark_master")
            return {"engine": "spark", "spark": spark_session(master)}
        return {"engine": "duckdb", "cache": tmp / "cache"}

    def prepare(self, progress: Callable[[str], None] | None = None, config: dict | None = None) -> PrepSummary:
        """Logs to counts (and, with DuckDB, the exposure cache), as a new preparation."""
        inp = self._inputs(config)
        holder = {}

        def build(tmp: Path) -> None:
            res = prepare_counts(inp["impressions"], inp["conversions"], inp["outcomes"], users=inp["users"],
                                 spend=inp["spend"], rules=self.rules, progress=progress, **self._engine_kwargs(tmp))
            res.summary.totals["input_sha256"] = self._hashes(config)
            res.counts.to_parquet(tmp / "counts.parquet", index=False)
            write_json(res.summary.to_dict(), tmp / "counts.summary.json")
            holder["summary"] = res.summary

        name = self._build_generation(build)
        self._switch(name)  # current first, then the config (see add_placebo)
        if config is not None:
            self.config = config
            self._write_config()
        return holder["summary"]

    def _hashes(self, config: dict | None = None) -> dict:
        i = (config or self.config)["inputs"]
        return input_sha256({k: _as_list(i[k]) for k in PREP_INPUT_KEYS if k in i})

    def _stage_new_outcomes(self, outcomes_file, conversions) -> tuple[dict, pd.DataFrame, dict, list[str]]:
        """Check the new outcomes, keep a copy in ``inputs/`` and return (inputs, new rows, new config,
        conversion sources).  The copy stays unreferenced until the new config is written."""
        from liftpool.data_prep.incremental import check_new_outcomes

        src = Path(outcomes_file)
        if not src.is_file():
            raise InputError(problem="file not found", file=str(src), fix="check the path of the new outcomes file")
        if conversions and not Path(conversions).is_file():
            raise InputError(problem="file not found", file=str(conversions), fix="check the conversions path")
        inp = self._inputs()
        new = check_new_outcomes(inp["outcomes"], read_table(src), str(src))
        conv_sources = [str(Path(conversions).resolve())] if conversions else inp["conversions"]
        n = len(list((self.path / "inputs").glob("added_outcomes_*.csv"))) + 1
        kept = self.path / "inputs" / f"added_outcomes_{n:03d}.csv"
        write_text(new.to_csv(index=False), kept)
        new_config = json.loads(json.dumps(self.config))
        new_config["inputs"]["outcomes"] = _as_list(self.config["inputs"]["outcomes"]) + [str(kept.resolve())]
        if conversions:
            new_config["inputs"]["conversions"] = inp["conversions"] + conv_sources
        return inp, new, new_config, conv_sources

    def add_placebo(self, outcomes_file, conversions=None, progress: Callable[[str], None] | None = None
                    ) -> tuple[PrepSummary, int]:
        """Register new placebo outcomes and count only their conversions; returns the summary and rows read.

        A Spark workspace keeps no local exposure cache, so there every outcome is recounted on Spark.
        """
        from liftpool.data_prep.incremental import add_outcomes

        if self.engine == "spark":
            _, _, new_config, _ = self._stage_new_outcomes(outcomes_file, conversions)
            (progress or (lambda _m: None))("Spark workspace: recounting every outcome on Spark")
            with _unstage_on_failure(new_config):
                summary = self.prepare(progress=progress, config=new_config)
            return summary, int(summary.totals.get("impression_rows", 0))
        gen = self.current()
        if gen is None or not (gen / "cache").is_dir():
            raise InputError(problem="the workspace has no current preparation with an exposure cache",
                             file=str(self.path), fix=f"run 'liftpool prepare {self.path}' first")
        inp, new, new_config, conv_sources = self._stage_new_outcomes(outcomes_file, conversions)
        all_out = pd.concat([inp["outcomes"], new], ignore_index=True)
        holder = {}

        def build(tmp: Path) -> None:
            (progress or (lambda _m: None))(f"counting {len(new)} new placebo pair(s) from the cached exposures")
            res, rows = add_outcomes(gen / "cache", tmp / "cache", all_out, new, conv_sources, self.rules)
            res.summary.totals["input_sha256"] = self._hashes(new_config)
            res.counts.to_parquet(tmp / "counts.parquet", index=False)
            write_json(res.summary.to_dict(), tmp / "counts.summary.json")
            holder["summary"], holder["rows"] = res.summary, rows

        # build the new preparation, make it current, then list the new files in the config. A crash
        # between the last two leaves counts that already have the new placebo and a config that
        # does not list it yet: a retry of the same add-placebo then succeeds (it recounts and lists
        # it), and a fit in between uses the counts, which include it. The other order left a config
        # listing a placebo the counts lacked, and refused the retry as "already listed".
        with _unstage_on_failure(new_config):
            name = self._build_generation(build)
        self._switch(name)
        self.config = new_config
        self._write_config()
        return holder["summary"], holder["rows"]

    def fit(self, quick: bool = False, progress: Callable[[str], None] | None = None, progressbar: bool = False,
            groups: dict | None = None, experiments: str | None = None, **overrides) -> tuple[str, FitResult]:
        """Fit the current counts into a new ``fits/<id>/``; returns the id and the fit.

        ``experiments`` is a randomized tests file for this fit; by default the workspace's
        ``inputs.experiments`` (if set).
        """
        counts = self.counts()
        settings = self.settings(**overrides)
        tests = self.experiments(experiments, counts)
        fit = fit_counts(counts, settings, quick=quick, groups=groups, progress=progress, progressbar=progressbar,
                         experiments=tests)
        fits = self.path / "fits"
        fits.mkdir(exist_ok=True)
        n = 1 + max([int(p.name.split("-")[0]) for p in fits.iterdir() if p.name[:3].isdigit()], default=0)
        fid = f"{n:03d}-{fit.mode}"
        gen = self.current()
        ps = self.prep_summary()
        with atomic_folder(fits / fid) as staging:
            fit.save(staging)
            write_json({"id": fid, "created": _now(), "mode": fit.mode, "prepared": gen.name if gen else None,
                        "counts_sha256": fit.info.get("counts_sha256"),
                        "inputs_sha256": (ps.totals.get("input_sha256") if ps else {}),
                        "config": self.config, "seed": settings.seed, "versions": fit.info.get("versions"),
                        "converged": fit.converged, "diagnostics": fit.diagnostics.to_dict(),
                        "placebo_pairs": int((counts.drop_duplicates(["campaign", "outcome"]).role
                                              == "placebo").sum())},
                       staging / "manifest.json")
        return fid, fit

    def fit_ids(self) -> list[str]:
        fits = self.path / "fits"
        return sorted(p.name for p in fits.iterdir() if p.is_dir() and p.name[:3].isdigit()) if fits.is_dir() else []

    def resolve_fit(self, fid: str | None) -> str:
        ids = self.fit_ids()
        if not ids:
            raise InputError(problem="the workspace has no fits yet", file=str(self.path),
                             fix=f"run 'liftpool fit {self.path}' first")
        if fid is None:
            return ids[-1]
        match = [i for i in ids if i == fid or i.split("-")[0] == str(fid).zfill(3)]
        if not match:
            raise InputError(problem=f"no fit '{fid}' (fits: {', '.join(ids)})", file=str(self.path / "fits"),
                             fix="give one of the fit ids 'liftpool history' lists")
        return match[0]

    def load_fit(self, fid: str | None = None) -> FitResult:
        return load_fit(self.path / "fits" / self.resolve_fit(fid))

    def report(self, fid: str | None = None, progress: Callable[[str], None] | None = None) -> Path:
        """Write ``reports/<id>/`` for a fit (the newest by default)."""
        from liftpool.reports import read_spend, write_report

        fid = self.resolve_fit(fid)
        rep = self.config.get("report", {})
        spend = read_spend(self.config["inputs"]["spend"]) if "spend" in self.config["inputs"] else None
        out = self.path / "reports" / fid
        n = 2
        while out.exists():
            out = self.path / "reports" / f"{fid}.{n}"
            n += 1
        (progress or (lambda _m: None))(f"writing the report of fit {fid}")
        manifest = json.loads((self.path / "fits" / fid / "manifest.json").read_text())
        prov = {"workspace": str(self.path.resolve()), "fit id": fid, "prepared": str(manifest.get("prepared"))}
        return write_report(self.path / "fits" / fid, out, spend=spend, prep_summary=self.prep_summary_of(manifest),
                            currency=rep.get("currency", "USD"), level=rep.get("level"),
                            title=rep.get("title", "Display advertising lift report"), provenance=prov,
                            screen=self.latest_screen())

    def screen(self, candidates: list[str] | None = None, progress: Callable[[str], None] | None = None) -> Path:
        """Screen the candidate covariates on this workspace's inputs into ``screens/NNN/`` (never over one)."""
        from liftpool.screen import screen_inputs

        inp = self._inputs()
        result = screen_inputs(inp["impressions"], inp["conversions"], inp["outcomes"], users=inp["users"],
                               rules=self.rules, candidates=candidates, settings=self.settings(), progress=progress)
        root = self.path / "screens"
        root.mkdir(exist_ok=True)
        n = len([p for p in root.iterdir() if p.is_dir() and p.name.isdigit()]) + 1
        out = root / f"{n:03d}"
        while out.exists():
            n += 1
            out = root / f"{n:03d}"
        return result.save(out)

    def latest_screen(self):
        """The newest screen of this workspace (a ScreenResult), or None."""
        from liftpool.screen import load_screen

        root = self.path / "screens"
        done = sorted(p for p in root.iterdir() if p.is_dir() and p.name.isdigit()) if root.is_dir() else []
        return load_screen(done[-1]) if done else None

    def prep_summary_of(self, manifest: dict) -> PrepSummary | None:
        gen = manifest.get("prepared")
        p = self.path / "prepared" / str(gen) / "counts.summary.json"
        return PrepSummary.from_dict(json.loads(p.read_text())) if p.is_file() else self.prep_summary()

    def history(self) -> pd.DataFrame:
        """One row per fit: id, when, mode, converged, placebo pairs, pooled bias and portfolio lift."""
        rows = []
        for fid in self.fit_ids():
            d = self.path / "fits" / fid
            try:
                m = json.loads((d / "manifest.json").read_text())
                s = pd.read_csv(d / "summary.csv")
                port = s[(s.campaign == PORTFOLIO) & (s.quantity == "lift")]
                bias = s[s.quantity == "bias"]["median"]
                mode = str(m["mode"])
                rows.append({"fit": fid, "created": m["created"], "mode": mode,
                             # a quick fit has no sampler, so there is nothing to converge
                             "converged": ("yes" if m["converged"] else "NO") if mode == "full" else "quick (no sampler checks)",
                             "placebo pairs": m.get("placebo_pairs"), "prepared": m.get("prepared"),
                             "median bias (log odds)": float(bias.median()) if len(bias) else float("nan"),
                             "portfolio lift (median)": float(port["median"].iloc[0]) if len(port) else float("nan")})
            except Exception as exc:  # noqa: BLE001 - one damaged fit must not hide the others
                rows.append({"fit": fid, "created": "", "mode": "", "converged": "",
                             "placebo pairs": None, "prepared": None, "median bias (log odds)": float("nan"),
                             "portfolio lift (median)": float("nan"),
                             "note": f"damaged: {type(exc).__name__}: {str(exc).splitlines()[0][:120] if str(exc) else ''}"})
        return pd.DataFrame(rows)

    def compare(self, a: str, b: str) -> tuple[pd.DataFrame, bytes]:
        """How each campaign's bias and lift interval moved between two fits: a table and a PNG figure."""
        from liftpool.reports.compare import compare_fits

        fa, fb = self.resolve_fit(a), self.resolve_fit(b)
        return compare_fits(load_fit(self.path / "fits" / fa), load_fit(self.path / "fits" / fb), fa, fb)


def _repr_html_(self) -> str:  # Jupyter: the workspace's fit history
    from html import escape

    h = self.history()
    rows = "".join(f"<tr><td>{escape(str(r['fit']))}</td><td>{escape(str(r['mode']))}</td>"
                   f"<td>{escape(str(r['converged']))}</td><td>{r['placebo pairs']}</td>"
                   f"<td>{r['portfolio lift (median)']:+.1%}</td></tr>" for _, r in h.iterrows())
    return (f"<div><p>liftpool workspace {escape(str(self.path))}</p><table><tr><th>fit</th><th>mode</th>"
            f"<th>converged</th><th>placebo pairs</th><th>portfolio lift</th></tr>{rows}</table></div>")


Workspace._repr_html_ = _repr_html_
