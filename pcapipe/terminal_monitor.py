"""Terminal text for monitoring: alarm counts and the worst rows of ``pcapipe project``."""

from __future__ import annotations

import pyarrow.parquet as pq

__all__ = ["alarm_line", "explain_text"]


def alarm_line(counts: dict, limits: dict) -> str:
    """One line: rows over the T^2 and SPE limits, with the limits and the confidence."""
    n = max(counts["rows"], 1)
    t2 = limits.get("t2")
    t2_text = f"{t2:.4g}" if t2 is not None else "n/a"
    return (f"{counts['t2_alarms']} of {counts['rows']} rows ({counts['t2_alarms'] / n:.2%}) above the T2 limit "
            f"{t2_text}, {counts['spe_alarms']} ({counts['spe_alarms'] / n:.2%}) above the SPE limit "
            f"{limits['spe']:.4g} (confidence {limits['confidence']:g}; expected share without a fault: "
            f"{1 - limits['confidence']:.0%} each)")


def explain_text(result, parts, inputs, n: int, top: int = 3) -> str:
    """The ``n`` projected rows farthest beyond a limit, with the features that contribute most."""
    from .explain import explain_rows, extreme_rows
    from .project import _paths

    keep = [c for c in result.manifest["config"]["input"].get("keep", [])]
    paths = _paths(inputs)
    names = pq.ParquetFile(parts[0]).schema_arrow.names if parts else []
    keep = [c for c in keep if c in names]
    worst = extreme_rows(list(parts), result.limits, n, training=False, extra_columns=keep)
    if worst.empty:
        return "no rows to explain"
    table = explain_rows(result, worst, paths, top)
    lines = [f"the {len(table)} row(s) farthest beyond a limit (severity = max(t2/T2 limit, spe/SPE limit); "
             "top features with their share of the statistic):"]
    for row, r in table.iterrows():
        ident = ", ".join(f"{c}={r[c]}" for c in keep)
        lines.append(f"  row {row} (file {int(r['part'])}, row {int(r['part_row'])}{', ' + ident if ident else ''}): "
                     f"t2 {r['t2']:.4g}, spe {r['spe']:.4g}, severity {r['severity']:.3g}")
        lines.append(f"      spe: {r['top_spe']}")
        lines.append(f"      t2:  {r['top_t2']}")
    return "\n".join(lines)
