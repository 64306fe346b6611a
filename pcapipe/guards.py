"""Guard rails: features that make the leading component meaningless, found early.

Two mistakes produce a PC1 that is valid arithmetic and useless analysis:

* a **row id** among the features (an integer that is unique and increasing):
  its variance, ``n (n + 1) / 12`` for the ids ``0 .. n - 1``, grows with the
  number of rows and swamps every measurement;
* **one feature holding most of the variance** with ``model.scale = false``:
  PC1 is then that feature alone, because covariance PCA is not invariant to
  the units of the columns (Jolliffe 2002, *Principal Component Analysis*,
  2nd ed., section 2.3).

Both are looked for twice: in the Parquet footers while planning (``pcapipe
check``; statistics only, nothing decoded), and exactly after the moments pass
of a run (log and manifest).
"""

from __future__ import annotations

import pyarrow as pa

__all__ = ["FooterStats", "moment_warnings", "DOMINANT_SHARE"]

# Above this share of the total variance one feature is "PC1" by itself (common practice, no source).
DOMINANT_SHARE = 0.9


def _row_id_text(name: str, lo: int, hi: int, how: str) -> str:
    return (f"feature {name!r} looks like a row id (integers {lo}..{hi}, one per row, {how}); a component "
            "of an id is meaningless: move it to input.keep, or add it to input.exclude")


def _dominant_text(name: str, share: float, how: str) -> str:
    return (f"feature {name!r} holds {share:.0%} of the {how} with model.scale = false, so PC1 will be "
            "that feature alone: set model.scale = true (correlation PCA), or exclude it if it is not a "
            "measurement")


class FooterStats:
    """Footer statistics of the feature columns, gathered file by file while planning.

    Row-id candidates are integer features whose every row group holds a
    run of consecutive values (``max - min == rows - 1``) with no nulls; a
    candidate is dropped at the first row group that breaks this.  Value
    ranges for the variance hint come from the first row group with rows.
    """

    def __init__(self, schema: pa.Schema, features):
        self.ids = {n: {"lo": None, "hi": None, "prev": None, "increasing": True, "groups": 0}
                    for n in features if pa.types.is_integer(schema.field(n).type)}
        self.ranges: dict[str, float] | None = None
        self.features = tuple(features)

    def add(self, md) -> None:
        """Take the statistics of one file's footer (``pyarrow.parquet.FileMetaData``)."""
        if not self.ids and self.ranges is not None:
            return
        leaf = {md.schema.column(j).path: j for j in range(md.num_columns)}
        for g in range(md.num_row_groups):
            rg = md.row_group(g)
            if rg.num_rows == 0:
                continue
            if self.ranges is None:  # one row group is enough for a hint, and cheap on wide tables
                self.ranges = self._ranges(rg, leaf)
            for name in [n for n in self.ids if n in leaf]:
                st = rg.column(leaf[name]).statistics
                usable = st is not None and st.has_min_max and st.null_count == 0
                self._id_group(name, st if usable else None, rg.num_rows)
            if not self.ids:
                return

    def _ranges(self, rg, leaf: dict) -> dict[str, float]:
        """max - min of every feature in one row group; empty unless every feature has statistics."""
        out = {}
        for name in self.features:
            st = rg.column(leaf[name]).statistics if name in leaf else None
            if st is None or not st.has_min_max:
                return {}
            out[name] = float(st.max) - float(st.min)
        return out

    def _id_group(self, name: str, st, rows: int) -> None:
        c = self.ids[name]
        if st is None or int(st.max) - int(st.min) != rows - 1:
            del self.ids[name]
            return
        c["increasing"] &= c["prev"] is None or int(st.min) > c["prev"]
        c["prev"] = int(st.max)
        c["lo"] = int(st.min) if c["lo"] is None else min(c["lo"], int(st.min))
        c["hi"] = int(st.max) if c["hi"] is None else max(c["hi"], int(st.max))
        c["groups"] += 1

    def row_ids(self, n_rows: int) -> tuple[tuple[str, int, int, bool], ...]:
        """Features spanning exactly ``n_rows`` consecutive integers: (name, lo, hi, proven).

        ``proven``: two or more row groups, each a consecutive run, increasing and
        not overlapping, so the values are distinct without decoding them.
        """
        return tuple((n, c["lo"], c["hi"], c["increasing"] and c["groups"] >= 2)
                     for n, c in self.ids.items() if c["groups"] and c["hi"] - c["lo"] == n_rows - 1)

    def hints(self, n_rows: int, scale: bool, first_file: str) -> list[str]:
        """What ``pcapipe check`` can say from the statistics alone."""
        ids = [n for n, _, _, _ in self.row_ids(n_rows)]
        out = [_row_id_text(n, lo, hi, "increasing, by the footer statistics") if proven else
               (f"feature {n!r} may be a row id (integers {lo}..{hi}, as many as there are rows, by the footer "
                "statistics; the run checks whether they are distinct); if it is, move it to input.keep")
               for n, lo, hi, proven in self.row_ids(n_rows)]
        ranges = {n: r for n, r in (self.ranges or {}).items() if r == r}  # NaN-free
        # relative to the largest range, so that ranges of 1e160 do not overflow (the run refuses those)
        top = max(ranges.values(), default=0.0)
        total = sum((r / top) ** 2 for r in ranges.values()) if 0 < top < float("inf") else 0.0
        if not scale and len(self.features) > 1 and total > 0:
            name = max(ranges, key=ranges.get)
            share = 1.0 / total
            if share > DOMINANT_SHARE and name not in ids:  # an id's own warning says more
                out.append(_dominant_text(name, share, f"sum of squared value ranges in the footer statistics "
                                                       f"of {first_file} (an estimate of the variance)"))
        return out


def moment_warnings(plan, m, scale: bool, center: bool) -> list[str]:
    """The guard-rail warnings of a run, from the exact moments.

    A row id is confirmed when its sample variance equals ``N (N + 1) / 12``,
    that of ``N`` distinct consecutive integers, ``N`` being the number of rows.
    """
    import numpy as np

    var = np.asarray(m.variance(), dtype=float)
    out = []
    index = {f: j for j, f in enumerate(plan.features)}
    unweighted = getattr(m, "weight", None) is None
    ids = []
    for name, lo, hi, proven in plan.row_ids:
        if name not in index:
            continue
        n = hi - lo + 1
        exact = n * (n + 1) / 12.0
        confirmed = unweighted and m.n == n and abs(var[index[name]] - exact) <= 1e-9 * exact
        if proven or confirmed:
            out.append(_row_id_text(name, lo, hi, "distinct by the moments" if not proven else "increasing"))
            ids.append(name)
    diag = var if center else var + np.asarray(m.mean) ** 2 * (m.n / max(m.n - 1, 1))
    if getattr(plan, "feature_weights", None) is not None:
        diag = diag * np.asarray(plan.feature_weights, dtype=float) ** 2  # applied after centering
    total = float(diag.sum())
    if not scale and diag.size > 1 and total > 0 and np.isfinite(total):
        j = int(np.argmax(diag))
        if diag[j] / total > DOMINANT_SHARE and plan.features[j] not in ids:
            out.append(_dominant_text(plan.features[j], diag[j] / total, "total variance"))
    return out
