"""Input tables: load files or DataFrames into DuckDB, validate them, expose typed views.

Validation runs as SQL on DuckDB for both engines (files and DataFrames alike),
so one set of checks and one set of messages serves every path.  Each check
is a predicate on the raw table; all predicates are counted in a single scan
and only a failing one is looked at again to list its first rows.
"""

from __future__ import annotations

import contextlib
import difflib
import os
import weakref
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import pandas as pd

from liftpool.data_prep.errors import BadRow, InputError
from liftpool.data_prep.rules import CountingRules

__all__ = [
    "Column",
    "Table",
    "Inputs",
    "SPECS",
    "INPUT_KINDS",
    "open_inputs",
    "file_format",
    "connect",
]

INPUT_KINDS = ("impressions", "conversions", "outcomes", "users", "spend")
_NUMERIC = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT", "USMALLINT",
            "UINTEGER", "UBIGINT", "FLOAT", "DOUBLE", "REAL")
_INTEGER = _NUMERIC[:9]
_TIMESTAMP = ("TIMESTAMP", "TIMESTAMP WITH TIME ZONE", "TIMESTAMP_NS", "TIMESTAMP_MS",
              "TIMESTAMP_S", "DATE")
TRUE_WORDS = ("true", "t", "yes", "y", "1")
FALSE_WORDS = ("false", "f", "no", "n", "0")


@dataclass(frozen=True)
class Column:
    """The contract of one input column."""

    name: str
    kind: str  # id | text | timestamp | bool | number | choice
    required: bool = True
    nullable: bool = False
    choices: tuple[str, ...] = ()
    minimum: float | None = None


SPECS: dict[str, tuple[Column, ...]] = {
    "impressions": (Column("user_id", "id"), Column("campaign", "text"), Column("served_at", "timestamp")),
    "conversions": (Column("user_id", "id"), Column("outcome", "text"), Column("converted_at", "timestamp")),
    "outcomes": (Column("campaign", "text"), Column("outcome", "text"),
                 Column("role", "choice", choices=("target", "placebo"))),
    "users": (Column("user_id", "id"),),
    "spend": (Column("campaign", "text"), Column("spend", "number", minimum=0.0),
              Column("value_per_conversion", "number", required=False, nullable=True, minimum=0.0)),
}
VIEWABLE = Column("viewable", "bool", nullable=True)
MEASUREMENT = (
    Column("ad_format", "choice", choices=("display", "video")),
    Column("ad_width", "number", nullable=True, minimum=0.0),
    Column("ad_height", "number", nullable=True, minimum=0.0),
    Column("seconds_in_view_50", "number", nullable=True, minimum=0.0),
    Column("seconds_in_view_30", "number", required=False, nullable=True, minimum=0.0),
)


#: Every connection :func:`connect` made that is still open (weakly held): Ctrl-C interrupts their queries.
_OPEN = weakref.WeakSet()


def interrupt_queries() -> None:
    """Interrupt the running query of every open connection (a signal handler's job: DuckDB does not
    stop for a KeyboardInterrupt raised while it works; it raises its InterruptException instead)."""
    for con in list(_OPEN):
        with contextlib.suppress(Exception):
            con.interrupt()


def connect(threads: int | None = None, memory_limit: str | None = None) -> duckdb.DuckDBPyConnection:
    """A DuckDB connection set to UTC, with a spill folder for out-of-core work."""
    con = duckdb.connect(":memory:")
    _OPEN.add(con)
    con.execute("SET TimeZone = 'UTC'").fetchall()
    # DuckDB 2.0 folds isnan() to false from Parquet min/max statistics, which leave NaN out, so a NaN
    # written by pyarrow would pass as a number (and an unmeasured impression count as measured).
    # Without statistics propagation the NaN is seen; the rules treat it as empty (see _expr_and_checks).
    con.execute("SET disabled_optimizers = 'statistics_propagation'").fetchall()
    if threads:
        con.execute(f"SET threads = {int(threads)}").fetchall()
    if memory_limit:
        con.execute(f"SET memory_limit = '{memory_limit}'").fetchall()
    return con


def file_format(path: str | os.PathLike) -> str:
    """``csv`` or ``parquet`` from the file name; anything else is an input error."""
    name = str(path).lower()
    if name.endswith((".csv", ".csv.gz", ".tsv")):
        return "csv"
    if name.endswith((".parquet", ".pq")):
        return "parquet"
    raise InputError(
        problem="unknown file type",
        file=str(path),
        fix="give a .csv, .csv.gz or .parquet file (the type is chosen by the extension)",
    )


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _lit(s: str) -> str:
    return "'" + s.replace("'", "''") + "'"


@dataclass
class Table:
    """One loaded input table."""

    kind: str
    label: str
    raw: str
    types: dict[str, str]
    n_rows: int
    view: str = ""

    @property
    def columns(self) -> list[str]:
        return list(self.types)


@dataclass
class Inputs:
    """The validated inputs on one DuckDB connection, with typed views.

    Typed views are named ``t_impressions``, ``t_conversions``, ``t_outcomes``
    and, when given, ``t_users`` and ``t_spend``.
    """

    con: duckdb.DuckDBPyConnection
    tables: dict[str, Table]
    id_type: str
    has_viewable_column: bool
    numeric_covariates: dict[str, bool] = field(default_factory=dict)
    #: What is valid but probably not what the analyst meant (printed loudly, kept in the prep summary).
    warnings: list[str] = field(default_factory=list)

    def label(self, kind: str) -> str:
        return self.tables[kind].label

    def has(self, kind: str) -> bool:
        return kind in self.tables


def _frame_label(kind: str, source: pd.DataFrame) -> str:
    """The label of an input given as a DataFrame (it must have columns)."""
    label = f"{kind} table (DataFrame)"
    if len(source.columns) == 0:
        raise InputError(problem="the table has no columns", file=label,
                         fix=f"pass a DataFrame with the {kind} columns")
    return label


def _load_spark(con, kind: str, source) -> Table:
    """The Spark twin of :func:`_load`: the same checks, Spark's readers (any path Spark can read)."""
    from liftpool.data_prep.engine_spark import parquet_paths

    raw = f"raw_{kind}"
    if isinstance(source, pd.DataFrame):
        label = _frame_label(kind, source)
        types, n_rows = con.load_frame(raw, source)
    else:
        paths = parquet_paths(source)
        label = " + ".join(str(x) for x in (source if isinstance(source, (list, tuple)) else [source]))
        fmts = {file_format(x) for x in paths}
        if len(fmts) > 1:
            raise InputError(problem="the files mix CSV and Parquet", file=label,
                             fix=f"give all {kind} files in one format")
        for x in paths:
            if "://" not in x and not Path(x).exists():
                raise InputError(problem="file not found", file=x, fix="check the path and the file name")
        types, n_rows = con.load_files(raw, paths, fmts.pop(), label)
    if n_rows == 0:
        raise InputError(problem="the table has a header but no data rows", file=label,
                         fix=f"export the {kind} table again with its rows")
    return Table(kind=kind, label=label, raw=raw, types=types, n_rows=int(n_rows))


#: Characters DuckDB's readers take as a file pattern (glob) rather than as part of a name.
GLOB_CHARACTERS = frozenset("*?[]{}")
_LINKS: dict = {}


def _literal_path(path: Path) -> Path:
    """A path DuckDB reads as exactly this one file.

    DuckDB expands ``*``, ``?`` and ``[...]`` in file names, so ``impressions[12].csv`` would read
    ``impressions1.csv``. A name with such characters is read through a symbolic link with a plain
    name (in a private temporary folder, removed when the process ends)."""
    if not GLOB_CHARACTERS & set(str(path)):
        return path
    import atexit
    import shutil
    import tempfile

    if "dir" not in _LINKS:
        _LINKS["dir"] = Path(tempfile.mkdtemp(prefix="liftpool-inputs-"))
        atexit.register(shutil.rmtree, _LINKS["dir"], True)
    key = str(path.resolve())
    if key not in _LINKS:
        suffix = "".join(x for x in path.suffixes[-2:] if not GLOB_CHARACTERS & set(x))
        link = _LINKS["dir"] / f"input{len(_LINKS)}{suffix}"
        link.symlink_to(path.resolve())
        _LINKS[key] = link
    return _LINKS[key]


def _check_csv_header(path: Path) -> None:
    """A header that names a column twice is refused (a reader would silently rename one of them)."""
    import csv

    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            header = next(csv.reader(fh), [])
    except UnicodeDecodeError as exc:
        raise InputError(problem=f"the file is not UTF-8 text (byte {exc.start} of the header)", file=str(path),
                         fix="save the file as UTF-8 CSV (or Parquet)") from None
    seen, dup = set(), []
    for name in (h.strip() for h in header):
        if name in seen and name not in dup:
            dup.append(name)
        seen.add(name)
    if dup:
        raise InputError(problem=f"the header names {', '.join(repr(d) for d in dup)} more than once", file=str(path),
                         column=dup[0], fix="give each column one name; drop or rename the repeated column")


def _load(con: duckdb.DuckDBPyConnection, kind: str, source) -> Table:
    from liftpool.data_prep.engine_spark import is_spark

    if is_spark(con):
        return _load_spark(con, kind, source)
    raw = f"raw_{kind}"
    if isinstance(source, pd.DataFrame):
        label = _frame_label(kind, source)
        con.register(f"df_{kind}", source)
        con.execute(f"CREATE OR REPLACE VIEW {raw} AS SELECT * FROM df_{kind}").fetchall()
    else:
        paths = [Path(x) for x in source] if isinstance(source, (list, tuple)) else [Path(source)]
        label = " + ".join(str(x) for x in paths)
        fmts = {file_format(x) for x in paths}
        if len(fmts) > 1:
            raise InputError(problem="the files mix CSV and Parquet", file=label,
                             fix=f"give all {kind} files in one format")
        fmt = fmts.pop()
        for path in paths:
            if not path.is_file():
                raise InputError(problem="file not found", file=str(path), fix="check the path and the file name")
            if path.stat().st_size == 0:
                raise InputError(problem="the file is empty", file=str(path),
                                 fix=f"export the {kind} table again; it needs a header and data rows")
            if fmt == "csv":
                _check_csv_header(path)
        p = "[" + ", ".join(_lit(str(_literal_path(x))) for x in paths) + "]"
        reader = (f"read_csv({p}, header = true, all_varchar = true, union_by_name = true)" if fmt == "csv"
                  else f"read_parquet({p}, union_by_name = true)")
        try:
            con.execute(f"CREATE OR REPLACE VIEW {raw} AS SELECT * FROM {reader}").fetchall()
        except duckdb.Error as exc:
            raise InputError(problem=f"cannot read the file: {str(exc).splitlines()[0]}", file=label,
                             fix=f"check that it is a valid {fmt.upper()} file") from None
    try:
        desc = con.execute(f"DESCRIBE {raw}").fetchall()
        n_rows = con.execute(f"SELECT count(*) FROM {raw}").fetchall()[0][0]
    except duckdb.Error as exc:
        raise InputError(problem=f"cannot read the file: {str(exc).splitlines()[0]}", file=label,
                         fix="check that the file is complete and well formed") from None
    types = {row[0]: str(row[1]).upper() for row in desc}
    if n_rows == 0:
        raise InputError(problem="the table has a header but no data rows", file=label,
                         fix=f"export the {kind} table again with its rows")
    return Table(kind=kind, label=label, raw=raw, types=types, n_rows=int(n_rows))


def _require_columns(table: Table, columns: list[Column]) -> None:
    have = table.columns
    for col in columns:
        if col.required and col.name not in have:
            close = difflib.get_close_matches(col.name, have, n=1, cutoff=0.6)
            close = close or [c for c in have if c.lower() == col.name.lower()]
            hint = f"rename column '{close[0]}' to '{col.name}'" if close else f"add a column '{col.name}'"
            raise InputError(
                problem=f"required column is missing (the file has: {', '.join(have)})",
                file=table.label, column=col.name, fix=hint,
            )


def _base_type(t: str) -> str:
    return t.split("(")[0].strip()


def _expr_and_checks(col: Column, rtype: str, id_type: str) -> tuple[str, list[tuple[str, str, str]]]:
    """Typed SQL expression for a column and its checks (predicate, problem, fix)."""
    c = _q(col.name)
    base = _base_type(rtype)
    is_text = base == "VARCHAR"
    empty = f"({c} IS NULL" + (f" OR trim({c}) = ''" if is_text else "") + ")"
    checks: list[tuple[str, str, str]] = []
    if col.kind in ("id", "text"):
        expr = f"CAST({c} AS {id_type if col.kind == 'id' else 'VARCHAR'})"
        checks.append((empty, "{n} empty value(s)", f"every row needs a {col.name}"))
        return expr, checks
    if col.kind == "timestamp":
        if base in _TIMESTAMP:
            expr = f"CAST({c} AS TIMESTAMP)"
            checks.append((f"{c} IS NULL", "{n} empty timestamp(s)", f"every row needs a {col.name}"))
        elif is_text:
            expr = f"CAST(try_cast({c} AS TIMESTAMPTZ) AS TIMESTAMP)"
            checks.append((f"try_cast({c} AS TIMESTAMPTZ) IS NULL",
                           "{n} value(s) are empty or not ISO 8601 timestamps",
                           "write timestamps in ISO 8601, e.g. 2026-03-01T14:05:00Z (no offset means UTC)"))
        else:
            expr = "CAST(NULL AS TIMESTAMP)"
            checks.append(("TRUE", f"the column has type {rtype}, not timestamps",
                           "store ISO 8601 text or a timestamp type, e.g. 2026-03-01T14:05:00Z"))
        return expr, checks
    if col.kind == "bool":
        if base == "BOOLEAN":
            expr = c
            bad = "FALSE"
        elif base in _INTEGER:
            expr = f"CASE WHEN {c} IS NULL THEN NULL ELSE {c} <> 0 END"
            bad = f"({c} IS NOT NULL AND {c} NOT IN (0, 1))"
        else:
            v = f"lower(trim(CAST({c} AS VARCHAR)))"
            t = ", ".join(_lit(w) for w in TRUE_WORDS)
            f = ", ".join(_lit(w) for w in FALSE_WORDS)
            expr = f"CASE WHEN {v} IN ({t}) THEN TRUE WHEN {v} IN ({f}) THEN FALSE ELSE NULL END"
            bad = f"({c} IS NOT NULL AND {v} <> '' AND {v} NOT IN ({t}, {f}))"
        checks.append((bad, "{n} value(s) are not true/false",
                       f"write {col.name} as true or false (leave it empty for an unmeasured impression)"))
        return expr, checks
    if col.kind == "number":
        # NaN (as numpy and pyarrow write a missing float) means empty, as in pandas; infinity is an error
        if base in _NUMERIC or base.startswith("DECIMAL"):
            raw = f"CAST({c} AS DOUBLE)"
            notnum = "FALSE"
        elif is_text:
            raw = f"try_cast(NULLIF(trim({c}), '') AS DOUBLE)"
            notnum = f"({c} IS NOT NULL AND trim({c}) <> '' AND try_cast(trim({c}) AS DOUBLE) IS NULL)"
        else:
            raw = "CAST(NULL AS DOUBLE)"
            notnum = "TRUE"
        expr = raw if raw.startswith("CAST(NULL") else f"CASE WHEN isnan({raw}) THEN NULL ELSE {raw} END"
        checks.append((f"({notnum} OR isinf({expr}))", "{n} value(s) are not numbers",
                       f"write {col.name} as a plain number such as 1.5"))
        if not col.nullable:
            checks.append((f"({expr} IS NULL)", "{n} empty value(s)", f"every row needs a {col.name}"))
        if col.minimum is not None:
            checks.append((f"({expr} < {col.minimum!r})", f"{{n}} value(s) are below {col.minimum:g}",
                           f"{col.name} cannot be negative; fix the export"))
        return expr, checks
    if col.kind == "choice":
        v = f"lower(trim(CAST({c} AS VARCHAR)))"
        opts = ", ".join(_lit(x) for x in col.choices)
        expr = v
        checks.append((f"({c} IS NULL OR {v} NOT IN ({opts}))",
                       f"{{n}} value(s) are not one of {', '.join(col.choices)}",
                       f"set {col.name} to one of: {', '.join(col.choices)}"))
        return expr, checks
    raise ValueError(col.kind)


def _run_checks(con, table: Table, checks: list[tuple[str, str, str, str]],
                probes: list[str] = ()) -> list[int]:
    """Count every check (and probe) in one scan; raise on the first failing check, listing its rows.

    Returns the counts of the ``probes`` (predicates that are not errors).
    """
    preds = [pred for _, pred, _, _ in checks] + list(probes)
    if not preds:
        return []
    sums = ", ".join(f"SUM(CASE WHEN {pred} THEN 1 ELSE 0 END)" for pred in preds)
    counts = con.execute(f"SELECT {sums} FROM {table.raw}").fetchall()[0]
    for (colname, pred, problem, fix), n in zip(checks, counts[: len(checks)], strict=True):
        if n:
            shown = _q(colname) if colname in table.types else "NULL"
            rows = con.execute(
                f"SELECT rn, CAST({shown} AS VARCHAR) FROM (SELECT row_number() OVER () AS rn, * "
                f"FROM {table.raw}) WHERE {pred} ORDER BY rn LIMIT 5"
            ).fetchall()
            bad = [BadRow(int(rn), "empty" if v is None or str(v).strip() == "" else repr(v)) for rn, v in rows]
            raise InputError(problem=problem.format(n=int(n)), file=table.label, column=colname,
                             rows=bad, fix=fix, n_bad=int(n))
    return [int(x or 0) for x in counts[len(checks):]]


def _typed_view(con, table: Table, columns: list[Column], id_type: str, extra_select: list[str] | None = None) -> None:
    exprs: list[str] = []
    checks: list[tuple[str, str, str, str]] = []
    probes: list[tuple[int, str, str]] = []  # (index in exprs, probe predicate, cheap expression)
    for col in columns:
        if col.name not in table.types:
            exprs.append(f"CAST(NULL AS DOUBLE) AS {_q(col.name)}")
            continue
        expr, cks = _expr_and_checks(col, table.types[col.name], id_type)
        if col.kind == "choice":
            # values already in canonical form need no lower(trim()) on every row
            c = _q(col.name)
            opts = ", ".join(_lit(x) for x in col.choices)
            probes.append((len(exprs), f"({c} IS NULL OR CAST({c} AS VARCHAR) NOT IN ({opts}))",
                           f"CAST({c} AS VARCHAR)"))
        exprs.append(f"{expr} AS {_q(col.name)}")
        checks.extend((col.name, *ck) for ck in cks)
    if table.kind == "impressions" and "ad_format" in table.types:
        fmt = _expr_and_checks(MEASUREMENT[0], table.types["ad_format"], id_type)[0]
        w = _expr_and_checks(MEASUREMENT[1], table.types["ad_width"], id_type)[0]
        h = _expr_and_checks(MEASUREMENT[2], table.types["ad_height"], id_type)[0]
        checks.append(("ad_width", f"({fmt} = 'display' AND ({w} IS NULL OR {h} IS NULL))",
                       "{n} display impression(s) have no ad_width or ad_height",
                       "give every display impression its size in pixels (it decides the 50% or 30% rule)"))
    probe_counts = _run_checks(con, table, checks, [p for _, p, _ in probes])
    for (i, _, cheap), n in zip(probes, probe_counts, strict=True):
        if n == 0:
            name = exprs[i].rsplit(" AS ", 1)[1]
            exprs[i] = f"{cheap} AS {name}"
    table.view = f"t_{table.kind}"
    select = ", ".join(exprs + (extra_select or []))
    con.execute(f"CREATE OR REPLACE VIEW {table.view} AS SELECT {select} FROM {table.raw}").fetchall()


def _duplicates(con, table: Table, keys: list[str], problem: str, fix: str) -> None:
    """Raise when rows repeat the same ``keys``: a cheap grouped count first, the rows only when needed."""
    k = ", ".join(_q(x) for x in keys)
    n = con.execute(f"SELECT count(*) FROM (SELECT {k} FROM {table.raw} GROUP BY {k} HAVING count(*) > 1)").fetchall()[0][0]
    if not n:
        return
    rows = con.execute(
        f"SELECT rn, {k} FROM (SELECT row_number() OVER () AS rn, {k}, count(*) OVER (PARTITION BY {k}) AS n "
        f"FROM {table.raw}) WHERE n > 1 ORDER BY rn LIMIT 5"
    ).fetchall()
    raise InputError(problem=problem.format(n=n), file=table.label, column=", ".join(keys),
                     rows=[BadRow(int(r[0]), ", ".join(repr(v) for v in r[1:])) for r in rows], fix=fix)


def open_inputs(
    impressions,
    conversions,
    outcomes,
    users=None,
    spend=None,
    covariates: tuple[str, ...] = (),
    con: duckdb.DuckDBPyConnection | None = None,
    large_ad_pixels: int = CountingRules.large_ad_pixels,
) -> Inputs:
    """Load and validate the inputs; raise :class:`InputError` on the first problem.

    Parameters
    ----------
    impressions, conversions, outcomes : path or DataFrame
        Required inputs (CSV or Parquet by extension, or DataFrames).
    users, spend : path or DataFrame, optional
        Optional inputs.
    covariates : tuple of str
        Users-table columns to be used as cell covariates (built-ins excluded).
    con : DuckDB connection, optional
        Where to load them; a new one is made when omitted.
    large_ad_pixels : int
        The counting rules' size from which display ads follow the 30% rule (a warning names the
        impressions of that size when their measurement column is missing).

    Notes
    -----
    What is valid but probably a mistake (impressions repeated row for row, large ads without their
    measurement column, outcomes without any conversion row) is collected in ``Inputs.warnings``.
    """
    con = con or connect()
    sources = {"impressions": impressions, "conversions": conversions, "outcomes": outcomes,
               "users": users, "spend": spend}
    tables: dict[str, Table] = {}
    for kind, src in sources.items():
        if src is None:
            continue
        t = _load(con, kind, src)
        _require_columns(t, list(SPECS[kind]))
        tables[kind] = t

    imp = tables["impressions"]
    has_viewable = "viewable" in imp.types
    if not has_viewable:
        missing = [c.name for c in MEASUREMENT if c.required and c.name not in imp.types]
        if missing:
            raise InputError(
                problem=("no viewability: the file has neither a 'viewable' column nor the measurement "
                         f"columns (missing: {', '.join(missing)})"),
                file=imp.label, column="viewable",
                fix="add 'viewable' (true/false) or ad_format, ad_width, ad_height, seconds_in_view_50, "
                    "seconds_in_view_30 (see docs/data-format.md)",
            )

    id_kinds = [k for k in ("impressions", "conversions", "users") if k in tables]
    all_int = all(_base_type(tables[k].types["user_id"]) in _INTEGER for k in id_kinds)
    id_type = "BIGINT" if all_int else "VARCHAR"

    imp_cols = list(SPECS["impressions"]) + ([VIEWABLE] if has_viewable else list(MEASUREMENT))
    _typed_view(con, imp, imp_cols, id_type)
    warnings: list[str] = []
    # identical rows are valid (two ads on one page in the same second, with no impression id to tell
    # them apart), but an export joined twice looks the same: said, with its size
    k = ", ".join(_q(x) for x in imp.columns)
    n_rep = con.execute(f"SELECT COALESCE(SUM(n - 1), 0) FROM (SELECT count(*) AS n FROM {imp.raw} GROUP BY {k} "
                        f"HAVING count(*) > 1)").fetchall()[0][0]
    if n_rep:
        warnings.append(f"{imp.label}: {int(n_rep):,} impression row(s) ({_share(n_rep, imp.n_rows)}) repeat "
                        "an earlier row exactly (user, campaign, time and measurement). They are counted as "
                        "separate impressions (two ads on one page in the same second); if the export "
                        "duplicated them, remove the repeats, since they raise the frequency cells")
    if not has_viewable and "seconds_in_view_30" not in imp.types:
        n_large = con.execute(f"SELECT count(*) FROM {imp.view} WHERE ad_format = 'display' AND ad_width * ad_height "
                              f">= {int(large_ad_pixels)}").fetchall()[0][0]
        if n_large:
            warnings.append(f"{imp.label}: {int(n_large):,} display impression(s) ({_share(n_large, imp.n_rows)}) "
                            f"are {int(large_ad_pixels):,} pixels or larger, where the 30% rule applies, but the file "
                            "has no seconds_in_view_30 column: they count as unmeasured. Add the column to "
                            "measure them")
    _typed_view(con, tables["conversions"], list(SPECS["conversions"]), id_type)
    _typed_view(con, tables["outcomes"], list(SPECS["outcomes"]), id_type)
    numeric_cov: dict[str, bool] = {}
    if "users" in tables:
        u = tables["users"]
        _duplicates(con, u, ["user_id"], "{n} user_id value(s) appear on more than one row",
                    "keep one row per user in the users table")
        extra = []
        for cov in covariates:
            if cov not in u.types:
                raise InputError(
                    problem=f"covariate '{cov}' is not a column of the users table "
                            f"(columns: {', '.join(c for c in u.columns if c != 'user_id')})",
                    file=u.label, column=cov, fix="choose covariates from the users table's columns, "
                    "or the built-ins frequency and view_history")
            numeric_cov[cov] = _is_numeric(con, u, cov)
            cast = (f"try_cast(NULLIF(trim(CAST({_q(cov)} AS VARCHAR)), '') AS DOUBLE)" if numeric_cov[cov]
                    else f"NULLIF(CAST({_q(cov)} AS VARCHAR), '')")
            if numeric_cov[cov]:  # an infinite value has no bin (it would become a cell of its own)
                _run_checks(con, u, [(cov, f"isinf({cast})", "{n} value(s) are infinite",
                                      f"write {cov} as a finite number, or leave it empty when unknown")])
            extra.append(f"{cast} AS {_q(cov)}")
        _typed_view(con, u, list(SPECS["users"]), id_type, extra_select=extra)
    elif covariates:
        raise InputError(problem=f"covariate(s) {', '.join(covariates)} need a users table",
                         column=covariates[0], fix="pass --users with a users file, or use only the "
                         "built-in covariates frequency and view_history")
    if "spend" in tables:
        _typed_view(con, tables["spend"], list(SPECS["spend"]), id_type)
        _duplicates(con, tables["spend"], ["campaign"], "{n} campaign(s) appear on more than one row",
                    "keep one spend row per campaign")

    inputs = Inputs(con=con, tables=tables, id_type=id_type, has_viewable_column=has_viewable,
                    numeric_covariates=numeric_cov, warnings=warnings)
    _check_outcomes(inputs)
    return inputs


def _is_numeric(con, table: Table, col: str) -> bool:
    base = _base_type(table.types[col])
    if base in _NUMERIC or base.startswith("DECIMAL"):
        return True
    if base != "VARCHAR":
        return False
    c = _q(col)
    n_bad, n_ok = con.execute(
        f"SELECT SUM(CASE WHEN trim({c}) <> '' AND try_cast(trim({c}) AS DOUBLE) IS NULL THEN 1 ELSE 0 END), "
        f"SUM(CASE WHEN try_cast(trim({c}) AS DOUBLE) IS NOT NULL THEN 1 ELSE 0 END) FROM {table.raw}"
    ).fetchall()[0]
    return bool(n_ok) and not n_bad


def _check_outcomes(inputs: Inputs) -> None:
    """Cross-table rules on outcomes, campaigns and spend."""
    con = inputs.con
    out = inputs.tables["outcomes"]
    df = con.execute(f"SELECT row_number() OVER () AS rn, campaign, outcome, role FROM {out.view}").df()
    key = df.duplicated(["campaign", "outcome"], keep=False)
    if key.any():
        dup = df[key]
        roles = dup.groupby(["campaign", "outcome"])["role"].nunique()
        if (roles > 1).any():
            c, o = roles[roles > 1].index[0]
            rows = dup[(dup.campaign == c) & (dup.outcome == o)]
            raise InputError(
                problem=f"outcome '{o}' is both the target and a placebo of campaign '{c}'",
                file=out.label, column="role",
                rows=[BadRow(int(r.rn), f"{r.campaign!r}, {r.outcome!r}, {r.role!r}") for r in rows.itertuples()],
                fix="a placebo must be an outcome the campaign cannot cause; give it role placebo only "
                    "for other outcomes")
        raise InputError(
            problem=f"{int(key.sum())} duplicate (campaign, outcome) rows", file=out.label,
            column="campaign, outcome",
            rows=[BadRow(int(r.rn), f"{r.campaign!r}, {r.outcome!r}") for r in dup.itertuples()],
            fix="list each outcome once per campaign")
    targets = df[df.role == "target"].groupby("campaign").size()
    camps = df.groupby("campaign").size().index
    many = targets[targets > 1]
    if len(many):
        c = many.index[0]
        rows = df[(df.campaign == c) & (df.role == "target")]
        raise InputError(
            problem=f"campaign '{c}' has {int(many.iloc[0])} target outcomes", file=out.label, column="role",
            rows=[BadRow(int(r.rn), f"{r.campaign!r}, {r.outcome!r}, 'target'") for r in rows.itertuples()],
            fix="give each campaign exactly one target outcome; the others are placebos")
    none = [c for c in camps if c not in targets.index]
    if none:
        rows = df[df.campaign == none[0]]
        raise InputError(
            problem=f"campaign '{none[0]}' has no target outcome", file=out.label, column="role",
            rows=[BadRow(int(r.rn), f"{r.campaign!r}, {r.outcome!r}, {r.role!r}") for r in rows.itertuples()],
            fix="give each campaign exactly one outcome with role target")

    imp = inputs.tables["impressions"]
    served = set(con.execute(f"SELECT DISTINCT campaign FROM {imp.view}").df()["campaign"])
    absent = df[~df.campaign.isin(served)]
    if len(absent):
        raise InputError(
            problem=f"{absent.campaign.nunique()} campaign(s) are not in the impressions "
                    f"({inputs.label('impressions')})",
            file=out.label, column="campaign",
            rows=[BadRow(int(r.rn), repr(r.campaign)) for r in absent.itertuples()],
            fix="check the campaign names match the impressions exactly, or remove those rows")
    unlisted = sorted(served - set(df.campaign))
    if unlisted:
        raise InputError(
            problem=f"{len(unlisted)} campaign(s) served impressions but have no outcomes: "
                    + ", ".join(repr(c) for c in unlisted[:5]),
            file=out.label, column="campaign",
            fix="add each campaign's target (and placebo) outcomes, or leave its impressions out")
    conv = inputs.tables["conversions"]
    if "campaign" in conv.types:
        _absent_campaigns(con, conv, served, inputs.label("impressions"))
    _outcome_names(inputs, df)
    if inputs.has("spend"):
        _absent_campaigns(con, inputs.tables["spend"], served, inputs.label("impressions"))


def _share(n: int, total: int) -> str:
    """``n`` of ``total`` as a percentage a reader can take in ("< 0.1%" rather than "0.0%")."""
    f = n / max(total, 1)
    return "< 0.1%" if 0 < f < 0.001 else f"{f:.1%}"


def _outcome_names(inputs: Inputs, listed: pd.DataFrame) -> None:
    """Listed outcomes without a single conversion row: a typo when a close unlisted name has rows
    (refused: a campaign would silently get no conversions), otherwise a warning."""
    conv = inputs.tables["conversions"]
    have = inputs.con.execute(f"SELECT outcome, count(*) AS n FROM {conv.view} GROUP BY outcome").df()
    rows_of = dict(zip(have["outcome"].astype(str), have["n"].astype(int), strict=True))
    named = set(listed["outcome"])
    unlisted = [o for o in rows_of if o not in named]
    out = inputs.tables["outcomes"]
    for o in listed["outcome"].drop_duplicates():
        if o in rows_of:
            continue
        uses = listed[listed.outcome == o]
        roles = ", ".join(f"{r.role} of {r.campaign!r}" for r in uses.head(3).itertuples())
        close = difflib.get_close_matches(o, unlisted, n=1, cutoff=0.75)
        if close:
            raise InputError(
                problem=f"outcome '{o}' ({roles}) has no conversion rows, but the conversions have "
                        f"'{close[0]}' ({rows_of[close[0]]:,} rows), which no campaign lists",
                file=out.label, column="outcome",
                rows=[BadRow(int(r.rn), f"{r.campaign!r}, {r.outcome!r}, {r.role!r}") for r in uses.head(5).itertuples()],
                fix=f"if they are the same outcome, spell it '{close[0]}' in the outcomes file")
        inputs.warnings.append(f"{out.label}: outcome '{o}' ({roles}) has no conversion rows in "
                               f"{conv.label}; it adds nothing to the estimate"
                               + (" and its campaign's lift rests on no target conversion" if "target" in set(uses.role)
                                  else ""))


def _absent_campaigns(con, table: Table, served: set, imp_label: str) -> None:
    df = con.execute(f"SELECT row_number() OVER () AS rn, CAST(campaign AS VARCHAR) AS campaign FROM {table.raw}").df()
    absent = df[~df.campaign.isin(served)]
    if len(absent):
        raise InputError(
            problem=f"{absent.campaign.nunique()} campaign(s) are not in the impressions ({imp_label})",
            file=table.label, column="campaign",
            rows=[BadRow(int(r.rn), repr(r.campaign)) for r in absent.head(5).itertuples()],
            fix="check the campaign names match the impressions exactly")
