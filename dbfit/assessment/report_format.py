"""Numbers as a reader of the report expects them, one style for the whole page.

Counts get thousands separators (``12,345``). Other numbers keep about four significant digits in fixed
notation; from 1,000 up they get thousands separators and two decimals (a deviance reads ``1,229,140.12``,
never ``1.22914e+06``). Only magnitudes outside [1e-4, 1e12) are written as a power of ten
(``3.142 × 10⁻⁵``). Every p-value is written with four decimals, and below 0.0001 as ``< 0.0001``.
"""

from __future__ import annotations

import math
from typing import Any

MISSING = "\u2013"
SMALLEST_P = 1e-4
SUPERSCRIPT = str.maketrans(
    "-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079"
)


def power_of_ten(value: float, digits: int = 4) -> str:
    """``value`` as mantissa × 10 to an exponent written in superscript digits."""
    mantissa, exponent = f"{value:.{digits - 1}e}".split("e")
    return f"{mantissa} \u00d7 10{str(int(exponent)).translate(SUPERSCRIPT)}"


def number(value: Any, digits: int = 4) -> str:
    """A number for a table cell or a label (``None`` and NaN as a dash, booleans as yes and no)."""
    if value is None:
        return MISSING
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    value = float(value)
    if math.isnan(value):
        return MISSING
    if math.isinf(value):
        return "\u221e" if value > 0 else "-\u221e"
    size = abs(value)
    if value == 0:
        return "0"
    if size >= 1e12 or size < 1e-4:
        return power_of_ten(value, digits)
    if size >= 1000:
        return f"{value:,.2f}"
    decimals = max(digits - 1 - math.floor(math.log10(size)), 0)
    text = f"{value:.{decimals}f}"
    return "0" if float(text) == 0 else text


def fixed(value: float | None, decimals: int = 4) -> str:
    """A figure read against a fixed target (a calibration slope against 1, an intercept against 0): fixed
    decimals, so that a numerically zero intercept reads 0.0000, not a power of ten."""
    if value is None or math.isnan(value):
        return MISSING
    text = f"{value:.{decimals}f}"
    return text[1:] if float(text) == 0 and text.startswith("-") else text


def count(value: Any) -> str:
    """A count (a float that holds a whole number is shown as one)."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return MISSING
    return f"{int(round(float(value))):,}"


def p_value(value: float | None) -> str:
    """A p-value: four decimals, and ``< 0.0001`` below that."""
    if value is None or math.isnan(value):
        return MISSING
    return f"< {SMALLEST_P:.4f}" if value < SMALLEST_P else f"{value:.4f}"


def share(value: float | None) -> str:
    """A share of rows as a percentage with one decimal."""
    if value is None or math.isnan(value):
        return MISSING
    return f"{100 * value:.1f}%"
