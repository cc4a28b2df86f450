"""Data-prep throughput: a 20-million-row impression Parquet to counts.

Prints rows per second and peak memory for, measured in the same run:
  * liftpool's DuckDB engine (``prepare_counts`` on the files),
  * DuckDB's bare scan of the same columns (the floor: reading the file once),
  * a straightforward pandas implementation (read the files into pandas, then
    liftpool's pandas engine),
  * with ``--with-spark``: liftpool's Spark engine in local mode (``local[2]``, the same SQL),
    timed from session start and without it (the JVM's peak memory is reported separately),
and the ratios between them.  Each run is a separate process so peak memory is
its own.  Results go in docs/performance.md.

Usage: python benchmarks/prep_throughput.py [--rows 20000000] [--skip-pandas] [--with-spark]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

HERE = Path(__file__).resolve().parent
DATA = HERE / "_data"
WORST = "--worst-case" in sys.argv


def make_data(rows: int, folder: Path, seed: int = 5) -> dict:
    """Synthetic logs with the documented schema (invented data, for measurement only)."""
    folder.mkdir(parents=True, exist_ok=True)
    tag = f"{rows}{'_worst' if WORST else ''}"
    imp_path = folder / f"impressions_{tag}.parquet"
    meta = folder / f"meta_{tag}.json"
    if imp_path.exists() and meta.exists():
        return json.loads(meta.read_text())
    rng = np.random.default_rng(seed)
    # About 5 impressions per (user, campaign) and 5 campaigns per user: a realistic frequency.
    # (--worst-case: one impression per pair, the hardest shape for the group-by.)
    n_users = max(1000, rows // 25) if not WORST else max(1000, rows // 5)
    n_camp = 50
    base = np.datetime64("2026-03-01T00:00:00", "us").astype("int64")
    writer = None
    chunk = 2_000_000
    for start in range(0, rows, chunk):
        m = min(chunk, rows - start)
        uid = rng.integers(0, n_users, m)
        video = rng.random(m) < 0.15
        w = np.where(video, 640, rng.choice([300, 728, 160, 970], m))
        h = np.where(video, 360, rng.choice([250, 90, 600, 250], m))
        s50 = np.round(rng.exponential(1.2, m), 2)
        s50[rng.random(m) < 0.05] = np.nan
        tbl = pa.table({
            "user_id": pa.array(np.char.add("u", uid.astype(str))),
            "campaign": pa.array(np.char.add("camp-", (rng.integers(0, n_camp, m) if WORST else
                                                       (uid * 7 + rng.integers(0, 5, m)) % n_camp).astype(str))),
            "served_at": pa.array((base + rng.integers(0, 40 * 86400, m) * 1_000_000).astype("datetime64[us]")),
            "ad_format": pa.array(np.where(video, "video", "display")),
            "ad_width": pa.array(w), "ad_height": pa.array(h),
            "seconds_in_view_50": pa.array(s50), "seconds_in_view_30": pa.array(s50 + 0.3),
        })
        writer = writer or pq.ParquetWriter(imp_path, tbl.schema)
        writer.write_table(tbl)
    writer.close()
    n_conv = rows // 10
    outcomes = [f"out-{i}" for i in range(60)]
    pq.write_table(pa.table({
        "user_id": pa.array(np.char.add("u", rng.integers(0, n_users, n_conv).astype(str))),
        "outcome": pa.array(np.array(outcomes)[rng.integers(0, 60, n_conv)]),
        "converted_at": pa.array((base + rng.integers(0, 55 * 86400, n_conv) * 1_000_000).astype("datetime64[us]")),
    }), folder / f"conversions_{tag}.parquet")
    rows_out = []
    for c in range(n_camp):
        rows_out.append(f"camp-{c},out-{c},target")
        rows_out += [f"camp-{c},out-{50 + (c + k) % 10},placebo" for k in range(2)]
    (folder / "outcomes.csv").write_text("campaign,outcome,role\n" + "\n".join(rows_out) + "\n")
    info = {"rows": rows, "impressions": str(imp_path), "conversions": str(folder / f"conversions_{tag}.parquet"),
            "outcomes": str(folder / "outcomes.csv"), "bytes": imp_path.stat().st_size}
    meta.write_text(json.dumps(info))
    return info


def _child(mode: str, info: dict) -> None:
    t0 = time.perf_counter()
    if mode == "scan":
        import duckdb

        con = duckdb.connect()
        con.execute(
            "SELECT count(*), sum(hash(user_id)), sum(hash(campaign)), min(served_at), "
            "sum(seconds_in_view_50), sum(seconds_in_view_30), sum(ad_width * ad_height), "
            f"count(DISTINCT ad_format) FROM read_parquet('{info['impressions']}')").fetchall()
    elif mode == "liftpool":
        from liftpool.data_prep import prepare_counts

        prepare_counts(info["impressions"], info["conversions"], info["outcomes"])
    elif mode == "spark":
        from liftpool.data_prep import prepare_counts
        from liftpool.data_prep.engine_spark import spark_session

        spark = spark_session("local[2]", conf={"spark.driver.memory": "6g"})
        t1 = time.perf_counter()
        prepare_counts(info["impressions"], info["conversions"], info["outcomes"], engine="spark", spark=spark)
        work = time.perf_counter() - t1
        pid = spark.sparkContext._jvm.java.lang.ProcessHandle.current().pid()
        status = Path(f"/proc/{pid}/status").read_text()
        jvm = next(int(x.split()[1]) for x in status.splitlines() if x.startswith("VmHWM")) / 1024
        spark.stop()
        secs = time.perf_counter() - t0
        print(json.dumps({"mode": mode, "seconds": secs, "work_seconds": work, "jvm_peak_mb": jvm,
                          "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
        return
    elif mode == "pandas":
        import pandas as pd

        from liftpool.data_prep import prepare_counts

        imp = pd.read_parquet(info["impressions"])
        conv = pd.read_parquet(info["conversions"])
        out = pd.read_csv(info["outcomes"])
        prepare_counts(imp, conv, out, engine="pandas")
    secs = time.perf_counter() - t0
    peak_kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"mode": mode, "seconds": secs, "peak_mb": peak_kb / 1024}))


def run(mode: str, info: dict) -> dict:
    r = subprocess.run([sys.executable, __file__, "--child", mode, "--info", json.dumps(info)]
                       + (["--worst-case"] if WORST else []),
                       capture_output=True, text=True, check=True)
    return json.loads(r.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=20_000_000)
    ap.add_argument("--skip-pandas", action="store_true")
    ap.add_argument("--with-spark", action="store_true", help="also time the Spark engine (local[2])")
    ap.add_argument("--worst-case", action="store_true", help="one impression per (user, campaign)")
    ap.add_argument("--child")
    ap.add_argument("--info")
    a = ap.parse_args()
    if a.child:
        _child(a.child, json.loads(a.info))
        return
    info = make_data(a.rows, DATA)
    print(f"impressions: {a.rows:,} rows, {info['bytes'] / 1e6:,.0f} MB Parquet; cores: {os.cpu_count()}"
          f"{' (worst case: one impression per user and campaign)' if WORST else ''}")
    modes = ["scan", "liftpool"] + ([] if a.skip_pandas else ["pandas"]) + (["spark"] if a.with_spark else [])
    res = {m: run(m, info) for m in modes}
    for m, r in res.items():
        extra = (f"  (JVM peak {r['jvm_peak_mb']:,.0f} MB; {r['work_seconds']:.2f} s without session start)"
                 if m == "spark" else "")
        print(f"{m:9s} {r['seconds']:8.2f} s  {a.rows / r['seconds'] / 1e6:7.2f} M rows/s  "
              f"peak {r['peak_mb']:8,.0f} MB{extra}")
    lp = res["liftpool"]["seconds"]
    print(f"liftpool / bare scan time: {lp / res['scan']['seconds']:.2f}x")
    if "pandas" in res:
        print(f"pandas / liftpool time:    {res['pandas']['seconds'] / lp:.1f}x")
    if "spark" in res:
        print(f"spark local[2] / duckdb:   {res['spark']['seconds'] / lp:.1f}x "
              f"({res['spark']['work_seconds'] / lp:.1f}x without Spark's start-up)")


if __name__ == "__main__":
    main()
