"""Confounder screening: which covariates should define the cells?

For every candidate covariate (each users column and the built-ins ``frequency`` and
``view_history``) the screen measures its balance between seen and unseen users, its
association with the placebo outcomes, and the placebo bias with and without stratifying on
it; then it suggests a cell choice by greedy forward selection.  It never changes the counting
rules: each candidate set is counted by the same code as ``prepare``.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from liftpool.data_prep import CountingRules
from liftpool.data_prep.errors import InputError
from liftpool.data_prep.screening import SMD_FLAG, open_screen, users_columns
from liftpool.data_prep.sources import open_inputs
from liftpool.models import ModelSettings
from liftpool.models.screening import placebo_bias

__all__ = ["ScreenResult", "screen", "screen_inputs", "MIN_DROP_SD", "load_screen"]

#: A covariate joins the suggestion only if it lowers |placebo bias| by at least this many
#: posterior sds of the current pooled placebo effect (a noise covariate moves it by far less).
MIN_DROP_SD = 0.25


@dataclass
class ScreenResult:
    """What the screen found.

    Attributes
    ----------
    ranking : DataFrame
        One row per candidate: placebo bias without and with stratifying on it alone, the bias
        removed, cells and users lost, the largest |SMD| before, campaigns flagged, association.
    steps : DataFrame
        The greedy forward selection, one row per step (step 0 is no covariates).
    suggested : tuple of str
        The suggested cell covariates.
    balance_before, balance_after : DataFrame
        SMD per campaign, covariate and level, before and after stratifying on ``suggested``.
    association : DataFrame
        SMD between placebo converters and non-converters per covariate and level.
    """

    ranking: pd.DataFrame
    steps: pd.DataFrame
    suggested: tuple[str, ...]
    balance_before: pd.DataFrame
    balance_after: pd.DataFrame
    association: pd.DataFrame
    info: dict = field(default_factory=dict)

    def balance_summary(self) -> pd.DataFrame:
        """Per covariate and level, before and after stratification: the users-weighted mean |SMD| over
        campaigns (a small campaign's SMD is noisy, so it weighs less) and the campaigns flagged."""
        key = ["covariate", "level"]

        def summ(df):
            df = df.assign(abs_w=df["smd"].abs() * df["users"])
            g = df.groupby(key, sort=False)
            return g["abs_w"].sum() / g["users"].sum(), g["flagged"].sum()

        mb, fb = summ(self.balance_before)
        ma, fa = summ(self.balance_after)
        out = pd.DataFrame({"mean_abs_smd_before": mb, "campaigns_flagged_before": fb,
                            "mean_abs_smd_after": ma, "campaigns_flagged_after": fa})
        return out.reset_index()

    def render(self) -> str:
        lines = ["Confounder screen (placebo bias: the quick mode's pooled placebo effect, log odds; 0 is no bias)"]
        r = self.ranking.copy()
        show = r[["covariate", "bias_with", "bias_removed", "cells", "users_lost", "mean_abs_smd",
                  "campaigns_flagged", "placebo_association"]]
        lines.append(f"  without cells the placebo bias is {r['bias_without'].iloc[0]:+.4f}")
        lines.append(show.to_string(index=False, float_format=lambda v: f"{v:.4f}"))
        lines.append("")
        lines.append("Greedy forward selection (add while the placebo bias keeps falling):")
        lines.append(self.steps.to_string(index=False, float_format=lambda v: f"{v:.4f}"))
        lines.append("")
        lines.append("suggested covariates: " + (", ".join(self.suggested) if self.suggested else "(none)"))
        lines.append(f"|SMD| > {SMD_FLAG} is flagged (Austin 2009). Balance on the suggested cells:")
        lines.append(self.balance_summary().to_string(index=False, float_format=lambda v: f"{v:.3f}"))
        return "\n".join(lines)

    def to_dict(self) -> dict:
        return {"suggested": list(self.suggested), "info": self.info,
                "ranking": self.ranking.to_dict(orient="records"), "steps": self.steps.to_dict(orient="records")}

    def save(self, folder: str | Path) -> Path:
        """Write ``screen.json``, the CSV tables and ``balance.png`` into a new folder."""
        from liftpool.data_prep.io import atomic_folder, spreadsheet_safe, write_json, write_table
        from liftpool.reports.screening import balance_figure

        folder = Path(folder)
        with atomic_folder(folder) as tmp:
            write_json(self.to_dict(), tmp / "screen.json")
            write_table(spreadsheet_safe(self.ranking), tmp / "ranking.csv")
            write_table(spreadsheet_safe(self.steps), tmp / "steps.csv")
            write_table(spreadsheet_safe(self.balance_before.assign(stage="before")), tmp / "balance_before.csv")
            write_table(spreadsheet_safe(self.balance_after.assign(stage="after")), tmp / "balance_after.csv")
            write_table(spreadsheet_safe(self.association), tmp / "placebo_association.csv")
            write_table(spreadsheet_safe(self.balance_summary()), tmp / "balance_summary.csv")
            (tmp / "balance.png").write_bytes(balance_figure(self))
        return folder


def load_screen(folder: str | Path) -> ScreenResult:
    """Read a screen folder written by :meth:`ScreenResult.save`."""
    folder = Path(folder)
    doc = json.loads((folder / "screen.json").read_text())

    def csv(name):
        text_cols = {"level": str, "covariates": str, "added": str}
        df = pd.read_csv(folder / name, keep_default_na=False, na_values=[""], dtype=text_cols)
        for c in text_cols:
            if c in df:
                df[c] = df[c].fillna("")
        return df

    before = csv("balance_before.csv").drop(columns="stage")
    after = csv("balance_after.csv").drop(columns="stage")
    assoc = csv("placebo_association.csv")
    return ScreenResult(ranking=csv("ranking.csv"), steps=csv("steps.csv"), suggested=tuple(doc["suggested"]),
                        balance_before=before, balance_after=after, association=assoc, info=doc.get("info", {}))


def _users_lost(summary) -> int:
    t = summary.totals
    return int(t.get("users_one_arm_cells", 0)) + int(t.get("users_small_cells_dropped", 0))


def screen(data, settings: ModelSettings | None = None, progress: Callable[[str], None] | None = None,
           max_steps: int | None = None) -> ScreenResult:
    """Screen the candidates of a :class:`~liftpool.data_prep.screening.ScreenData`.

    Parameters
    ----------
    data : ScreenData
    settings : ModelSettings, optional
        Bias priors and seed of the quick mode's pooling.
    progress : callable, optional
    max_steps : int, optional
        Stop the forward selection after this many covariates.
    """
    s = settings or ModelSettings()
    say = progress or (lambda _m: None)

    done: dict[tuple[str, ...], dict] = {}

    def evaluate(covs: tuple[str, ...]) -> dict:
        if covs not in done:  # the ranking's single covariates are the greedy selection's first step
            counts, summary = data.counts(covs)
            b = placebo_bias(counts, s)
            cells = counts[counts["arm"] == "seen"][["campaign", "cell"]].drop_duplicates()
            done[covs] = {"bias": b.mean, "bias_sd": b.sd, "cells": int(len(cells)),
                          "users_lost": _users_lost(summary)}
        return done[covs]

    say("placebo bias without cells")
    base = evaluate(())
    say("balance of every candidate between seen and unseen users")
    before = data.balance(())
    say("association with the placebo outcomes")
    assoc = data.placebo_association()
    rows = []
    for cov in data.candidates:
        say(f"placebo bias stratified on {cov}")
        e = evaluate((cov,))
        bb = before[before["covariate"] == cov]
        bw = (bb["smd"].abs() * bb["users"]).sum() / bb["users"].sum() if len(bb) else 0.0
        aa = assoc[assoc["covariate"] == cov]
        rows.append({"covariate": cov, "kind": "numeric" if data.numeric[cov] else "categorical",
                     "bias_without": base["bias"], "bias_with": e["bias"], "bias_with_sd": e["bias_sd"],
                     "bias_removed": abs(base["bias"]) - abs(e["bias"]), "cells": e["cells"],
                     "users_lost": e["users_lost"],
                     "mean_abs_smd": float(bw),
                     "campaigns_flagged": int(bb[bb["flagged"]]["campaign"].nunique()),
                     "placebo_association": float(aa["mean_abs_smd"].max()) if len(aa) else 0.0})
    ranking = pd.DataFrame(rows).sort_values("bias_removed", ascending=False, kind="stable").reset_index(drop=True)
    ranking.insert(0, "rank", np.arange(1, len(ranking) + 1))

    say("greedy forward selection")
    chosen: tuple[str, ...] = ()
    current = base
    steps = [{"step": 0, "added": "(none)", "covariates": "", "bias": base["bias"], "bias_sd": base["bias_sd"],
              "cells": base["cells"], "users_lost": base["users_lost"], "kept": True}]
    limit = len(data.candidates) if max_steps is None else max_steps
    while len(chosen) < limit:
        trials = {c: evaluate(chosen + (c,)) for c in data.candidates if c not in chosen}
        if not trials:
            break
        best = min(trials, key=lambda c: abs(trials[c]["bias"]))
        e = trials[best]
        drop = abs(current["bias"]) - abs(e["bias"])
        keep = drop >= MIN_DROP_SD * current["bias_sd"]
        steps.append({"step": len(chosen) + 1, "added": best, "covariates": ", ".join(chosen + (best,)),
                      "bias": e["bias"], "bias_sd": e["bias_sd"], "cells": e["cells"],
                      "users_lost": e["users_lost"], "kept": bool(keep)})
        if not keep:
            break
        chosen = chosen + (best,)
        current = e
    say("balance after stratifying on the suggestion")
    after = data.balance(chosen)
    info = {"candidates": list(data.candidates), "min_drop_sd": MIN_DROP_SD, "smd_flag": SMD_FLAG,
            "rules": {k: v for k, v in data.rules.to_dict().items() if k != "covariates"}}
    return ScreenResult(ranking=ranking, steps=pd.DataFrame(steps), suggested=chosen, balance_before=before,
                        balance_after=after, association=assoc, info=info)


def screen_inputs(impressions, conversions, outcomes, users=None, rules: CountingRules | None = None,
                  candidates: list[str] | None = None, settings: ModelSettings | None = None,
                  progress: Callable[[str], None] | None = None) -> ScreenResult:
    """Screen from input files or DataFrames (see :func:`screen`).

    ``candidates`` defaults to every users column plus ``frequency`` and ``view_history``.
    """
    rules = rules or CountingRules()
    say = progress or (lambda _m: None)
    cols = users_columns(users)
    from liftpool.data_prep.rules import BUILTIN_COVARIATES

    cands = list(candidates) if candidates is not None else cols + list(BUILTIN_COVARIATES)
    user_cands = tuple(c for c in cands if c not in BUILTIN_COVARIATES)
    unknown = [c for c in user_cands if c not in cols]
    if unknown:
        raise InputError(problem=f"candidate covariate '{unknown[0]}' is neither a users column "
                                 f"({', '.join(cols) or 'no users table'}) nor a built-in",
                         file=None if users is None or isinstance(users, pd.DataFrame) else str(users),
                         column=unknown[0], fix="choose users columns or the built-ins frequency, view_history")
    say("reading and checking inputs")
    inputs = open_inputs(impressions, conversions, outcomes, users=users, covariates=user_cands)
    say("building exposures (one pass over the impressions)")
    data = open_screen(inputs, replace(rules, covariates=()), candidates=cands)
    return screen(data, settings=settings, progress=say)
