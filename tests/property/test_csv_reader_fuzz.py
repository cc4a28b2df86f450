"""Fuzz: the CSV reader and its validator, on logs a careless export or a hostile user could write.
Every file is either prepared or refused with an :class:`InputError` that names the file and gives a
fix; nothing else escapes (no crash, no internal error). Invented data only."""

from __future__ import annotations

import csv
import io

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from liftpool.data_prep import InputError, prepare_counts

HEADER = ["user_id", "campaign", "served_at", "viewable"]
GOOD = [["u1", "C1", "2026-03-01T10:00:00Z", "true"], ["u2", "C1", "2026-03-01T11:00:00Z", "false"],
        ["u3", "C1", "2026-03-02T10:00:00Z", "true"], ["u4", "C1", "2026-03-02T12:00:00Z", "false"]]
CONV = "user_id,outcome,converted_at\nu1,buy,2026-03-03T10:00:00Z\nu2,buy,2026-03-03T11:00:00Z\n"
OUT = "campaign,outcome,role\nC1,buy,target\nC1,visit,placebo\n"

#: Values that have broken readers: empties, quotes, separators, numbers of every spelling, control
#: characters, formulas, paths, SQL, non-ASCII, very long text.
NASTY = st.sampled_from(["", " ", '"', '""', ",", ";", "\t", "\n", "\r\n", "NaN", "nan", "inf", "-inf", "1e309",
                         "-0", "0x10", "TRUE", "yes", "null", "NULL", "None", "\\N", "=1+1", "@SUM(A1)",
                         "../../etc/passwd", "'; DROP TABLE t; --", "é", "名前", "\u202e", "\x00", "\x1b[31m",
                         "2026-02-30T00:00:00Z", "2026-03-01", "1970-01-01T00:00:00Z", "9999-12-31T23:59:59Z",
                         "x" * 5000])


@st.composite
def impressions_files(draw):
    rows = [list(r) for r in GOOD]
    header = list(HEADER)
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["cell", "cell", "cell", "header", "drop_column", "extra_column", "short_row",
                                     "dup_row", "bom", "raw_bytes"]))
        if kind == "cell":
            r, c = draw(st.integers(0, len(rows) - 1)), draw(st.integers(0, len(header) - 1))
            if c < len(rows[r]):
                rows[r][c] = draw(NASTY | st.text(max_size=20))
        elif kind == "header":
            header[draw(st.integers(0, len(header) - 1))] = draw(NASTY | st.text(max_size=12))
        elif kind == "drop_column" and len(header) > 1:
            i = draw(st.integers(0, len(header) - 1))
            header.pop(i)
            for r in rows:
                if i < len(r):
                    r.pop(i)
        elif kind == "extra_column":
            header.append(draw(NASTY | st.text(max_size=12)))
            for r in rows:
                r.append(draw(NASTY))
        elif kind == "short_row":
            rows[draw(st.integers(0, len(rows) - 1))].pop()
        elif kind == "dup_row":
            rows.append(list(rows[0]))
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    w.writerows(rows)
    data = buf.getvalue().encode("utf-8", "surrogatepass")
    if draw(st.booleans()) and draw(st.booleans()):
        data = b"\xef\xbb\xbf" + data  # a byte-order mark, as spreadsheets write
    if draw(st.integers(0, 9)) == 0:
        data = draw(st.binary(max_size=300))  # not a CSV at all
    return data


@pytest.mark.slow
@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
          derandomize=True)
@given(impressions_files())
def test_any_impressions_file_is_prepared_or_refused_with_a_message(tmp_path, data):
    imp = tmp_path / "impressions.csv"
    imp.write_bytes(data)
    (tmp_path / "conversions.csv").write_text(CONV)
    (tmp_path / "outcomes.csv").write_text(OUT)
    try:
        res = prepare_counts(imp, tmp_path / "conversions.csv", tmp_path / "outcomes.csv")
    except InputError as e:
        assert e.fix, str(e)
        assert str(tmp_path) in str(e) or e.file, str(e)
        return
    assert set(res.counts.columns) >= {"campaign", "cell", "arm", "outcome", "users", "conversions"}
