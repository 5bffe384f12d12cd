"""Numbers as text for tables a paper can take: one column, one format.

A column of numbers is shown with the same number of decimals in every row, chosen so that its
largest magnitude has the requested significant digits (``-4.45``, ``-4.43``, ``0.41`` rather
than ``-4.448``, ``0.4``, ``7.78e-05``). A column whose values span so many orders of magnitude
that a nonzero value would print as zero is shown in scientific notation throughout instead.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

#: Significant digits of tables unless the user asks for others.
DEFAULT_DIGITS = 3
# Beyond these magnitudes positional notation is hard to read (many digits or many zeros).
_LARGEST_POSITIONAL = 1e6


def _finite(value) -> bool:
    return (
        isinstance(value, (int, float))
        and not isinstance(value, bool)
        and math.isfinite(float(value))
    )


def column_decimals(values: Iterable, digits: int = DEFAULT_DIGITS) -> int | None:
    """Decimals that show the column's largest magnitude with ``digits`` significant digits;
    None when the column needs scientific notation (a nonzero value would round to zero, or a
    value reaches 1e6).

    Examples
    --------
    >>> column_decimals([-4.448, -4.422, 0.5], 3), column_decimals([0.218, 7.78e-05], 3)
    (2, None)
    """
    magnitudes = [abs(float(v)) for v in values if _finite(v)]
    nonzero = [m for m in magnitudes if m > 0]
    if not nonzero:
        return 0
    largest = max(nonzero)
    if largest >= _LARGEST_POSITIONAL:
        return None
    decimals = max(0, digits - 1 - math.floor(math.log10(largest)))
    if min(nonzero) < 0.5 * 10.0 ** (-decimals):
        return None
    return decimals


def column_text(values: Iterable, digits: int = DEFAULT_DIGITS, missing: str = "n/a") -> list:
    """The numbers of one table column as text in one format (see the module notes).

    Parameters
    ----------
    values : iterable of numbers (None, NaN and infinities are shown as ``missing``)
    digits : int
        Significant digits of the column's largest magnitude.
    missing : str
        Text for a value that is not a finite number.

    Returns
    -------
    list of str

    Examples
    --------
    >>> column_text([-4.448, -4.422, None], 3)
    ['-4.45', '-4.42', 'n/a']
    >>> column_text([0.218, 7.78e-05], 3)
    ['2.18e-01', '7.78e-05']
    """
    values = list(values)
    decimals = column_decimals(values, digits)
    out = []
    for v in values:
        if not _finite(v):
            out.append(missing)
        elif decimals is None:
            out.append(f"{float(v):.{digits - 1}e}")
        else:
            text = f"{float(v):.{decimals}f}"
            out.append(text[1:] if text.startswith("-") and float(text) == 0 else text)
    return out


def number_text(value, digits: int = DEFAULT_DIGITS, missing: str = "n/a") -> str:
    """One number with ``digits`` significant digits (trailing zeros kept: ``0.400``);
    non-numbers as text.

    Examples
    --------
    >>> number_text(0.4), number_text(-4.4476, 4), number_text(None), number_text("wald")
    ('0.400', '-4.448', 'n/a', 'wald')
    """
    if value is not None and not isinstance(value, (int, float)) or isinstance(value, bool):
        return str(value)
    return column_text([value], digits, missing)[0]
