"""Number formats shared by ``describe``, the report and the notebook table.

One rule per column, so a column reads the same everywhere and every entry of
it carries the same number of significant digits (trailing zeros kept:
``2.000``, not ``2``).
"""

from __future__ import annotations

import math

import pandas as pd

__all__ = ["sig", "percent", "SPECTRUM_HEADERS", "SPECTRUM_DIGITS", "spectrum_cells", "spectrum_shown",
           "flag", "FLAG_NOTES", "BEYOND"]

BEYOND = 10  # eigenvalues shown past the retained ones in describe and the report (the rest: spectrum.parquet)
FLAG_NOTES = {"*": "* retained but did not reach the tolerance",
              "~": "~ an estimate (a Ritz value, at most the eigenvalue it approximates), not converged"}

# column of spectrum.parquet -> significant digits shown (common practice, no source:
# four digits of an eigenvalue are more than its sampling error supports, three of a
# standard error or a residual are plenty)
SPECTRUM_DIGITS = {"eigenvalue": 4, "share": 3, "cumulative_share": 4, "residual": 3, "std_error": 3}
SPECTRUM_HEADERS = ("eigenvalue", "share", "cumulative", "residual", "std_error", "retained")


def sig(value, digits: int) -> str:
    """``value`` with exactly ``digits`` significant digits (``-`` for a missing value, NaN).

    Exponent notation is used below 1e-4 and from 10**digits on, as ``%g`` does.
    """
    try:
        v = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(v):
        return "-" if math.isnan(v) else ("inf" if v > 0 else "-inf")  # "-": not computed
    if v == 0:
        return "0." + "0" * (digits - 1) if digits > 1 else "0"
    text = format(v, f"#.{digits}g")
    mantissa, e, exponent = text.partition("e")
    return mantissa.rstrip(".") + (e + exponent if e else "")


def percent(value, digits: int) -> str:
    """A share in [0, 1] as a percentage with ``digits`` significant digits."""
    try:
        return sig(float(value) * 100.0, digits) + "%"
    except (TypeError, ValueError):
        return str(value)


def spectrum_shown(spectrum: pd.DataFrame, beyond: int = BEYOND) -> tuple[pd.DataFrame, int]:
    """The rows to show: the retained ones and ``beyond`` more; and how many are left out."""
    k = int(spectrum["retained"].sum()) if "retained" in spectrum else len(spectrum)
    shown = spectrum.iloc[: k + max(0, int(beyond))]
    return shown, len(spectrum) - len(shown)


def flag(row) -> str:
    """``*`` for a retained component that did not converge, ``~`` for an estimate beyond k, else ''."""
    if bool(row.get("converged", True)):
        return ""
    return "*" if bool(row.get("retained", True)) else "~"


def spectrum_cells(table: pd.DataFrame) -> list[tuple[str, ...]]:
    """Formatted cells of spectrum rows, in the order of :data:`SPECTRUM_HEADERS`."""
    d = SPECTRUM_DIGITS
    rows = []
    for _, r in table.iterrows():
        rows.append((
            sig(r["eigenvalue"], d["eigenvalue"]),
            percent(r["share"], d["share"]),
            percent(r["cumulative_share"], d["cumulative_share"]),
            sig(r["residual"], d["residual"]),
            sig(r["std_error"], d["std_error"]),
            "yes" if bool(r.get("retained", True)) else "",
        ))
    return rows
