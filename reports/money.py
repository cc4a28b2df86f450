"""Number and money formatting for finance readers."""

from __future__ import annotations

import math

import pandas as pd

__all__ = ["currency_symbol", "fmt_money", "fmt_pct", "fmt_pp", "fmt_plain", "fmt_int", "fmt_count", "fmt_ratio", "fmt_prob"]

_SYMBOLS = {"USD": "$", "EUR": "€", "GBP": "£", "JPY": "¥", "CAD": "C$", "AUD": "A$", "CHF": "CHF "}


def currency_symbol(code: str) -> str:
    """``$`` for USD, ``€`` for EUR...; other codes are written out (``SEK 1,000``)."""
    code = (code or "USD").upper()
    return _SYMBOLS.get(code, code + " ")


def _bad(x) -> bool:
    return x is None or x is pd.NA or (isinstance(x, float) and (math.isnan(x) or math.isinf(x)))


#: Amounts below this show cents; larger ones are whole (cents there are noise, and wide columns).
CENTS_BELOW = 1000


def fmt_money(x, code: str = "USD", decimals: int | None = None) -> str:
    """Money with thousands separators: ``$12,345``, with cents below :data:`CENTS_BELOW` (the one rule
    for every amount on the page, so that ``$167.00`` stands beside ``$47.52``, not ``$167``)."""
    if _bad(x):
        return "not bounded" if isinstance(x, float) and math.isinf(x) else "n/a"
    d = decimals if decimals is not None else (2 if abs(x) < CENTS_BELOW else 0)
    sign = "-" if x < 0 else ""
    return f"{sign}{currency_symbol(code)}{abs(x):,.{d}f}"


def fmt_pct(x, decimals: int = 1, signed: bool = True) -> str:
    """A fraction as a percentage: 0.123 -> ``+12.3%``."""
    if _bad(x):
        return "n/a"
    return f"{x * 100:+,.{decimals}f}%" if signed else f"{x * 100:,.{decimals}f}%"


def fmt_pp(x, decimals: int = 1) -> str:
    """A difference of two fractions in percentage points: 0.016 -> ``+1.6 pp`` (never "%", which
    would read as a relative change)."""
    if _bad(x):
        return "n/a"
    return f"{x * 100:+,.{decimals}f} pp"


def fmt_plain(x) -> str:
    """A plain number in a table (log odds, p-values, counts as floats): three decimals below 1,000,
    whole numbers with thousands separators above; never a float's raw digits."""
    if _bad(x):
        return "n/a"
    return f"{x:,.0f}" if abs(x) >= 1000 else f"{x:.3f}"


def fmt_int(x) -> str:
    if _bad(x):
        return "n/a"
    return f"{round(x):,}"


def fmt_count(x, singular: str = "conversion", plural: str = "conversions", unit: bool = True) -> str:
    """A whole count with its noun, singular for exactly one: ``1 conversion``, ``1,204 conversions``."""
    if _bad(x):
        return "n/a"
    n = round(x)
    text = f"{n:,}"
    return f"{text} {singular if abs(n) == 1 else plural}" if unit else text


def fmt_ratio(x) -> str:
    if _bad(x):
        return "n/a"
    return f"{x:,.2f}x"


def fmt_prob(p) -> str:
    if _bad(p):
        return "n/a"
    if p > 0.995:
        return "> 99%"
    if p < 0.005:
        return "< 1%"
    return f"{p * 100:.0f}%"
