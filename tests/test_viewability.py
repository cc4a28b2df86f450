"""Viewable-impression classification at the guideline thresholds.

Source: MRC Viewable Ad Impression Measurement Guidelines (with IAB), v1.0 June 30 2014;
v2.0 Aug 18 2015 keeps the baseline thresholds (listed in ../shared/references.md):
display 50% of pixels for 1 continuous second; display of 242,500 pixels or more 30% for
1 second; video 50% for 2 continuous seconds.
"""

from __future__ import annotations

import numpy as np
import pytest

from liftpool.data_prep import CountingRules, classify
from liftpool.data_prep.sources import connect
from liftpool.data_prep.viewability import sql_measured, sql_viewable

NAN = float("nan")
# (format, width, height, s50, s30, measured, viewable)
CASES = [
    ("display", 300, 250, 1.0, 1.0, True, True),      # exactly 1 s at 50%: viewable (MRC)
    ("display", 300, 250, 0.99, 5.0, True, False),    # under 1 s at 50%; 30% does not count for small ads
    ("display", 300, 250, NAN, 5.0, False, False),    # empty 50% measurement: unmeasured
    ("display", 970, 250, 0.2, 1.0, True, True),      # 242,500 px exactly is large: 30% for 1 s (MRC)
    ("display", 970, 250, 3.0, 0.99, True, False),    # large ad judged on the 30% measurement
    ("display", 970, 250, 3.0, NAN, False, False),    # large ad without the 30% measurement: unmeasured
    ("display", 970, 249, 0.99, 3.0, True, False),    # 241,530 px is not large: 50% rule
    ("display", 970, 249, 1.0, NAN, True, True),
    ("video", 640, 360, 2.0, 2.0, True, True),        # video: 2 continuous seconds at 50% (MRC)
    ("video", 640, 360, 1.99, 9.0, True, False),
    ("video", 1920, 1080, 1.5, 9.0, True, False),     # video never uses the 30% large-display rule
    ("video", 640, 360, NAN, NAN, False, False),
]


def _arrays():
    cols = list(zip(*CASES, strict=True))
    return (np.array(cols[0], dtype=object), np.array(cols[1], float), np.array(cols[2], float),
            np.array(cols[3], float), np.array(cols[4], float), np.array(cols[5]), np.array(cols[6]))


def test_numpy_rule_at_thresholds():
    fmt, w, h, s50, s30, want_m, want_v = _arrays()
    measured, viewable = classify(fmt, w, h, s50, s30)
    np.testing.assert_array_equal(measured, want_m)
    np.testing.assert_array_equal(viewable, want_v)


def test_sql_rule_matches_numpy_rule():
    fmt, w, h, s50, s30, want_m, want_v = _arrays()
    con = connect()
    import pandas as pd

    df = pd.DataFrame({"ad_format": fmt.astype(str), "ad_width": w, "ad_height": h,
                       "seconds_in_view_50": s50, "seconds_in_view_30": s30})
    con.register("d", df)
    rules = CountingRules()
    got = con.execute(f"SELECT {sql_measured(rules)}, {sql_viewable(rules)} FROM d").fetchall()
    np.testing.assert_array_equal([g[0] for g in got], want_m)
    np.testing.assert_array_equal([g[1] for g in got], want_v)


def test_thresholds_are_settings():
    fmt, w, h, s50, s30, _, _ = _arrays()
    strict = CountingRules(display_min_seconds=2.0, video_min_seconds=3.0)
    _, viewable = classify(fmt, w, h, s50, s30, strict)
    assert not viewable[0] and not viewable[8]  # 1 s display and 2 s video no longer pass


@pytest.mark.parametrize("pixels_rule", [242_500])
def test_large_ad_boundary_is_inclusive(pixels_rule):
    # 242,500 pixels "or more" (MRC guideline wording, via ../shared/references.md)
    m, v = classify(np.array(["display"], dtype=object), np.array([485.0]), np.array([500.0]),
                    np.array([0.0]), np.array([1.0]), CountingRules(large_ad_pixels=pixels_rule))
    assert m[0] and v[0]
