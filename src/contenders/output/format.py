"""Number formatting for the report: every number shown is formatted here, once.

The template receives strings only. Missing values (``None``, NaN) show as an em dash;
negative numbers use the minus sign; very large or very small magnitudes use powers of
ten; a comma separates thousands from 1,000 on. CSV files get the raw numbers instead
(see :func:`raw`).

Numbers of one quantity are shown with the same decimals: a column that holds one
quantity (elpd, SE, weights) is formatted with one count of decimals, and so is a row
that holds one statistic across columns (observed and replicated values, prior
quantiles): see :func:`decimals` and :func:`alike`. A value compared with a threshold
gets the digits needed to see on which side of it the value lies (:func:`against`).
Sentences written by different steps are joined with :func:`sentences`, so each starts
with a capital letter and ends with one full stop.
"""

from __future__ import annotations

import math
from typing import Any

MISSING = "—"
MINUS = "−"
_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _is_missing(x: Any) -> bool:
    if x is None:
        return True
    try:
        return math.isnan(float(x))
    except (TypeError, ValueError):
        return True


def _signed(text: str) -> str:
    return text.replace("-", MINUS)


def _grouped(text: str) -> str:
    """Thousands separated by commas in the integer part of a plain number: "1299702.5"
    becomes "1,299,702.5", "1440" becomes "1,440"; numbers below 1,000 are unchanged."""
    sign = "-" if text.startswith("-") else ""
    body = text[len(sign):]
    whole, dot, frac = body.partition(".")
    if not whole.isdigit() or len(whole) < 4:
        return text
    return sign + f"{int(whole):,d}" + dot + frac


def num(x: Any, sig: int = 3) -> str:
    """A number with ``sig`` significant digits (all digits before the point are kept);
    powers of ten outside 1e-4 .. 1e7."""
    if _is_missing(x):
        return MISSING
    x = float(x)
    if math.isinf(x):
        return "∞" if x > 0 else MINUS + "∞"
    if x == 0:
        return "0"
    mag = math.floor(math.log10(abs(x)))
    if -4 <= mag < 7:
        decimals = max(sig - 1 - mag, 0)
        text = f"{x:.{decimals}f}"
        if "." in text:
            text = text.rstrip("0").rstrip(".")
        return _signed(_grouped(text))
    mantissa, exponent = f"{x:.{sig - 1}e}".split("e")
    mantissa = mantissa.rstrip("0").rstrip(".") if "." in mantissa else mantissa
    return _signed(mantissa) + " × 10" + str(int(exponent)).translate(_SUPERSCRIPT)


def fixed(x: Any, decimals: int = 1) -> str:
    """A number with a fixed count of decimals (elpd, SE, weights, R-hat)."""
    if _is_missing(x):
        return MISSING
    x = float(x)
    if math.isinf(x):
        return "∞" if x > 0 else MINUS + "∞"
    text = f"{x:.{decimals}f}"
    if float(text) == 0:
        text = text.lstrip("-")
    return _signed(_grouped(text))


def integer(x: Any) -> str:
    """A whole number, thousands separated by commas (20,000)."""
    if _is_missing(x):
        return MISSING
    x = float(x)
    if math.isinf(x):
        return "∞" if x > 0 else MINUS + "∞"
    return _signed(f"{round(x):,d}")


#: The most decimals :func:`decimals` gives a column or row.
MAX_DECIMALS = 4


def _magnitude(x: float) -> int:
    return math.floor(math.log10(abs(x)))


def decimals(values: Any, sig: int = 3) -> int:
    """One count of decimals for numbers of one quantity (a column, or a row of one
    statistic): enough for the largest magnitude to show ``sig`` significant digits and
    the smallest non-zero one two, at most :data:`MAX_DECIMALS`. Missing, infinite and
    zero values do not count."""
    mags = []
    for v in values:
        if _is_missing(v) or math.isinf(float(v)) or float(v) == 0:
            continue
        mags.append(_magnitude(float(v)))
    if not mags:
        return 0
    need = max(sig - 1 - max(mags), 1 - min(mags), 0)
    return min(need, MAX_DECIMALS)


def alike(values: Any, sig: int = 3) -> list[str]:
    """``values`` formatted with one count of decimals (:func:`decimals`); magnitudes
    outside 1e-4 .. 1e7 use powers of ten as :func:`num` does."""
    values = list(values)
    d = decimals([v for v in values if _is_missing(v) or float(v) == 0
                  or 1e-4 <= abs(float(v)) < 1e7], sig)
    out = []
    for v in values:
        if _is_missing(v) or math.isinf(float(v)) or float(v) == 0 or 1e-4 <= abs(float(v)) < 1e7:
            out.append(fixed(v, d))
        else:
            out.append(num(v, sig))
    return out


def against(value: Any, threshold: float, decimals: int = 2) -> str:
    """``value`` with at least ``decimals`` decimals and as many more (up to 8) as it takes
    for the shown value to lie on the same side of ``threshold`` as the value itself:
    R-hat 1.0102 against 1.01 shows as "1.0102", not "1.010"; an ESS of 99.6 against 100
    as "99.6", not "100"; a value equal to the threshold as the threshold."""
    if _is_missing(value):
        return MISSING
    v, t = float(value), float(threshold)
    if math.isinf(v) or math.isnan(t):
        return fixed(v, decimals)
    d = max(decimals, 0)
    while d < 8:
        shown = round(v, d)
        if (v > t and shown > t) or (v < t and shown < t) or v == t:
            break
        d += 1
    return fixed(v, d)


def limit(threshold: float) -> str:
    """A threshold as written in a setting: 1.01, 0.7, 100 (no trailing zeros)."""
    return num(threshold, 6)


def sentence(text: str) -> str:
    """``text`` as one sentence: first letter capital, one full stop at the end (a
    question or exclamation mark kept); empty text stays empty. A first word that is a
    name from code or a file ("broken.stan:", "log_lik", "y_rep") keeps its case."""
    text = " ".join(str(text).split())
    if not text:
        return ""
    first = text.split(" ", 1)[0].rstrip(":,;")
    if first.isalpha():
        text = text[:1].upper() + text[1:]
    if text[-1] not in ".?!":
        text += "."
    return text


def sentences(parts: Any) -> str:
    """Clauses written by different steps joined as sentences: each starts with a capital
    letter and ends with one full stop ("see Predictive checks" and "only 3 % of ..."
    give "See Predictive checks. Only 3 % of ...")."""
    return " ".join(s for s in (sentence(p) for p in parts if p) if s)


def pvalue(p: Any) -> str:
    """A p-value: three decimals, with the ends written as bounds."""
    if _is_missing(p):
        return MISSING
    p = float(p)
    if p < 0.001:
        return "< 0.001"
    if p > 0.999:
        return "> 0.999"
    return f"{p:.3f}"


def pvalue_against(p: Any, low: float, high: float | None = None) -> str:
    """A p-value compared with ``low`` (and ``high``, for two-sided checks): three
    decimals, or as many more as it takes to show on which side of the threshold it lies
    (0.0098 against 0.01 shows as "0.0098", not "0.010")."""
    if _is_missing(p):
        return MISSING
    p = float(p)
    if p < 0.001 and p < low and low >= 0.001:
        return "< 0.001"
    if p > 0.999 and high is not None and p > high and high <= 0.999:
        return "> 0.999"
    near = high if high is not None and abs(p - high) < abs(p - low) else low
    return against(p, near, 3)


def share(x: Any, decimals: int = 0) -> str:
    """A proportion as a percentage."""
    if _is_missing(x):
        return MISSING
    return f"{100 * float(x):.{decimals}f} %"


def share_against(x: Any, threshold: float, decimals: int = 0) -> str:
    """A proportion as a percentage with the decimals needed to show on which side of
    ``threshold`` (a proportion) it lies: 0.496 against 0.5 shows as "49.6 %"."""
    if _is_missing(x):
        return MISSING
    return against(100 * float(x), 100 * float(threshold), decimals) + " %"


def seconds(s: Any) -> str:
    if _is_missing(s):
        return MISSING
    s = float(s)
    if s < 60:
        return f"{s:.1f} s"
    minutes, rest = divmod(round(s), 60)
    if minutes < 60:
        return f"{minutes} min {rest:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"


def interval(lo: Any, hi: Any, sig: int = 3) -> str:
    """A closed interval, for example a 90 % interval of replicated values."""
    if _is_missing(lo) and _is_missing(hi):
        return MISSING
    return f"{num(lo, sig)} to {num(hi, sig)}"


def bound(lo: Any, hi: Any) -> str:
    """A plausibility bound; open ends shown as infinity."""
    return f"{num(lo, 4)} to {num(hi, 4)}"


def raw(x: Any) -> Any:
    """A value for a CSV cell: full-precision numbers, empty for missing values."""
    if x is None:
        return ""
    if isinstance(x, bool):
        return "true" if x else "false"
    if isinstance(x, (list, tuple)):
        return " ".join(str(raw(v)) for v in x)
    try:
        import numpy as np

        if isinstance(x, np.generic):
            x = x.item()
    except ImportError:  # pragma: no cover - numpy is a dependency
        pass
    if isinstance(x, float):
        if math.isnan(x):
            return ""
        if math.isinf(x):
            return "inf" if x > 0 else "-inf"
        return repr(x)
    return x


def miss(size: Any, share_sd: Any = None, unit: str = "outcome") -> str:
    """The miss of a test statistic (observed minus the nearest end of the replicated 90 %
    interval, statistics/features.py): "inside" for 0; signed, with three significant
    digits, and for statistics in the outcome's units the share of the observed SD
    ("+12.3 (0.15 SD)"); a share statistic (``unit`` "share") in percentage points."""
    if _is_missing(size):
        return MISSING
    size = float(size)
    if size == 0:
        return "inside"
    sign = "+" if size > 0 else ""
    if unit == "share":
        return sign + num(100 * size, 2) + " % points"
    text = sign + num(size)
    if unit == "outcome" and not _is_missing(share_sd):
        text += f" ({num(abs(float(share_sd)), 2)} SD)"
    return text


def miss_words(size: Any, share_sd: Any = None, unit: str = "outcome") -> str:
    """The miss in words for a sentence: "2.1 or 0.01 SD above the replicated 90 %
    interval", "1.2 % points below ..."; empty when the size is unknown."""
    if _is_missing(size):
        return ""
    size = float(size)
    if size == 0:
        return "inside the replicated 90 % interval"
    amount = num(100 * abs(size), 2) + " % points" if unit == "share" else num(abs(size))
    if unit == "outcome" and not _is_missing(share_sd):
        amount += f" or {num(abs(float(share_sd)), 2)} SD"
    return f"{amount} {'above' if size > 0 else 'below'} the replicated 90 % interval"
