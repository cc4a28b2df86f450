"""Viewable-impression classification.

Thresholds follow the MRC/IAB Viewable Ad Impression Measurement Guidelines
(v1.0, 2014; v2.0, 2015 keeps them): a display ad is viewable with at least 50%
of its pixels in view for at least 1 continuous second; display ads of 242,500
pixels or more need 30% of pixels; video needs 50% for at least 2 continuous
seconds.  The seconds and pixel thresholds are settings of
:class:`~liftpool.data_prep.rules.CountingRules`.

An impression is *measured* when the measurement its rule needs is present:
``seconds_in_view_50`` for ordinary display and video, ``seconds_in_view_30``
for large display.  When the log has a ``viewable`` column it is used as is
(empty means unmeasured).
"""

from __future__ import annotations

import numpy as np

from liftpool.data_prep.rules import CountingRules

__all__ = ["classify", "sql_measured", "sql_viewable"]


def classify(
    ad_format: np.ndarray,
    width: np.ndarray,
    height: np.ndarray,
    seconds_50: np.ndarray,
    seconds_30: np.ndarray,
    rules: CountingRules | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Classify impressions from their measurement columns.

    Parameters
    ----------
    ad_format : array of str
        ``"display"`` or ``"video"`` (lower case).
    width, height : array of float
        Ad size in pixels.
    seconds_50, seconds_30 : array of float
        Longest continuous seconds with at least 50% / 30% of pixels in view;
        NaN when not measured.
    rules : CountingRules, optional
        Thresholds; the guideline defaults when omitted.

    Returns
    -------
    measured, viewable : ndarray of bool
        ``viewable`` is False wherever ``measured`` is False.
    """
    rules = rules or CountingRules()
    fmt = np.asarray(ad_format, dtype=object)
    s50 = np.asarray(seconds_50, dtype=float)
    s30 = np.asarray(seconds_30, dtype=float)
    pixels = np.asarray(width, dtype=float) * np.asarray(height, dtype=float)
    video = fmt == "video"
    large = (~video) & (pixels >= rules.large_ad_pixels)
    seconds = np.where(large, s30, s50)
    need = np.where(video, rules.video_min_seconds, rules.display_min_seconds)
    measured = ~np.isnan(seconds)
    viewable = measured & (np.nan_to_num(seconds, nan=-1.0) >= need)
    return measured, viewable


def _seconds_expr(rules: CountingRules) -> str:
    return (
        "CASE WHEN ad_format <> 'video' AND ad_width * ad_height >= "
        f"{rules.large_ad_pixels} THEN seconds_in_view_30 ELSE seconds_in_view_50 END"
    )


def sql_measured(rules: CountingRules) -> str:
    """SQL boolean: the impression carries the measurement its rule needs."""
    return f"(({_seconds_expr(rules)}) IS NOT NULL)"


def sql_viewable(rules: CountingRules) -> str:
    """SQL boolean: the impression is a viewable impression (False when unmeasured)."""
    need = (
        f"CASE WHEN ad_format = 'video' THEN {float(rules.video_min_seconds)!r} "
        f"ELSE {float(rules.display_min_seconds)!r} END"
    )
    return f"COALESCE(({_seconds_expr(rules)}) >= ({need}), FALSE)"
