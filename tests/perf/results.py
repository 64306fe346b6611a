"""Accuracy against the float64 reference, and the markdown tables of the benchmark."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Row", "accuracy", "markdown_table", "fmt"]


@dataclass
class Row:
    """One contender on one data set, as measured."""

    case: str
    layout: str
    label: str
    role: str                      # "floor", "floor-read", "pcapipe", "pcapipe-main", "other"
    wall: float = math.nan
    inner: float = math.nan
    rss_mb: float = math.nan
    cpu: float = math.nan          # user + system seconds of the child
    others: float = math.nan       # cores the rest of the machine kept busy meanwhile
    passes: str = ""
    acc: dict = field(default_factory=dict)
    converged: str = ""
    note: str = ""
    failed: str = ""
    x_floor: float = math.nan
    x_pcapipe: float = math.nan
    extra: dict = field(default_factory=dict)


def _sine_of_largest_angle(a: np.ndarray, b: np.ndarray) -> float:
    """sin of the largest principal angle between span(a) and span(b) (b orthonormal).

    The sine form stays accurate for tiny angles, where arccos of cosines
    near 1 would lose half the digits (Golub & Van Loan, Matrix Computations,
    4th ed., section 6.4.3).
    """
    qa, _ = np.linalg.qr(a)
    resid = qa - b @ (b.T @ qa)
    return float(min(1.0, np.linalg.norm(resid, 2)))


def accuracy(values, vectors, ref: dict, k: int, k_sep: int) -> dict:
    """Errors of the top ``k`` (and of the ``k_sep`` separated) pairs against the reference.

    ``eig``: max relative eigenvalue error; ``angle``: largest principal angle
    (radians) between the k-dimensional subspaces; ``vec``: largest angle
    between a computed vector and its reference vector, which also catches
    vectors that mix inside the subspace.
    """
    values = np.asarray(values, dtype=np.float64)
    order = np.argsort(values)[::-1]
    values = values[order]
    out = {}
    for tag, m in (("", k), ("sep_", k_sep)):
        if m > values.size:
            continue
        lam = ref["values"][:m]
        rel = np.abs(values[:m] - lam) / lam
        out[tag + "eig"] = float(rel.max())
        out[tag + "eig_worst"] = int(rel.argmax()) + 1
        out[tag + "eig_signed"] = float(((values[:m] - lam) / lam)[rel.argmax()])
        if vectors is not None:
            v = np.asarray(vectors, dtype=np.float64)[:, order][:, :m]
            w = ref["vectors"][:, :m]
            out[tag + "angle"] = math.asin(_sine_of_largest_angle(v, w))
            per = [_sine_of_largest_angle(v[:, [i]], w[:, [i]]) for i in range(m)]
            out[tag + "vec"] = math.asin(max(per))
        if m == k_sep:
            break
    return out


def fmt(x, digits: int = 3) -> str:
    """Compact number for a table cell ('' for NaN)."""
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return ""
    if isinstance(x, str):
        return x
    if x == 0:
        return "0"
    if abs(x) >= 1000 or abs(x) < 1e-2:
        return f"{x:.2e}"
    return f"{x:.{digits}g}"


_COLUMNS = ["case", "contender", "wall s", "inner s", "cpu s", "others", "peak RSS MB", "÷ floor", "÷ pcapipe", "passes",
            "eig rel err", "subspace angle", "vector angle", "converged", "note"]


def markdown_table(rows: list[Row]) -> str:
    """One line per contender, grouped by data set, in the order measured."""
    lines = ["| " + " | ".join(_COLUMNS) + " |", "|" + "|".join("---" for _ in _COLUMNS) + "|"]
    for r in rows:
        case = r.case + ("" if r.layout in ("", "scalar") else f" ({r.layout})")
        if r.failed:
            cells = [case, r.label, fmt(r.wall), "", "", "", fmt(r.rss_mb)] + [""] * 8 + [r.failed]
        else:
            a = r.acc
            eig = fmt(a.get("eig"))
            if "sep_eig" in a:
                eig = f"{fmt(a['sep_eig'])} (sep) / {eig}"
            ang = fmt(a.get("angle"))
            if "sep_angle" in a:
                ang = f"{fmt(a['sep_angle'])} (sep)"
            vec = fmt(a.get("sep_vec", a.get("vec")))
            cells = [case, r.label, fmt(r.wall), fmt(r.inner), fmt(r.cpu), f"{r.others:.2f}", f"{r.rss_mb:.0f}", fmt(r.x_floor),
                     fmt(r.x_pcapipe), r.passes, eig, ang, vec, r.converged, r.note]
        lines.append("| " + " | ".join(c.replace("|", "/") for c in cells) + " |")
    return "\n".join(lines)
