"""One rounding rule for every number written to ``metrics.json`` and ``report.md``."""

from __future__ import annotations

__all__ = ["SIGNIFICANT_DIGITS", "rounded"]

#: significant digits kept, so metrics are byte-stable and read well in ``dvc metrics diff``
SIGNIFICANT_DIGITS = 6


def rounded(value: float, digits: int = SIGNIFICANT_DIGITS) -> float:
    """``value`` rounded to ``digits`` significant digits (a plain Python float).

    Examples
    --------
    >>> rounded(3.14159265), rounded(-0.000123456789), rounded(0.0)
    (3.14159, -0.000123457, 0.0)
    """
    result = float(f"{float(value):.{digits}g}")
    return 0.0 if result == 0 else result  # no "-0.0" in the JSON
