"""Number formatting for the report: every number shown is formatted here, once.

The template receives strings only. Missing values (``None``, NaN) show as an em dash;
negative numbers use the minus sign; very large or very small magnitudes use powers of
ten. CSV files get the raw numbers instead (see :func:`raw`).
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
        return _signed(text)
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
    return _signed(text)


def integer(x: Any) -> str:
    if _is_missing(x):
        return MISSING
    x = float(x)
    if math.isinf(x):
        return "∞" if x > 0 else MINUS + "∞"
    return _signed(f"{round(x):d}")


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


def share(x: Any, decimals: int = 0) -> str:
    """A proportion as a percentage."""
    if _is_missing(x):
        return MISSING
    return f"{100 * float(x):.{decimals}f} %"


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
