"""The moments a run may go on with, and the preprocessing that follows from them.

After the moments pass (or the direct method's one read) and before any
checkpoint, the input is refused with one line naming the features and the
fix when: values are missing under ``input.missing = "fail"``; a feature has
no finite value to impute; the row weights leave nothing to fit; sums of
squares overflow float64; fewer than 2 rows are left; a feature is constant
under ``model.scale = true``.  Then the per-feature mean, standard deviation
(ddof=1) and scale give the row :class:`~pcapipe.conventions.Transform`.
"""

from __future__ import annotations

import logging

import numpy as np

from .conventions import Transform, missing_rule, transform_for
from .errors import InputError
from .moments import Moments
from .plan import Plan
from .weighted import check_total_weight

__all__ = ["moments_pass", "screened", "preprocessing"]

log = logging.getLogger("pcapipe")


def _missing_error(plan: Plan, m: Moments) -> InputError:
    idx = np.flatnonzero(m.missing)
    worst = idx[np.argsort(-m.missing[idx], kind="stable")][:5]
    listed = ", ".join(f"{plan.features[i]} ({int(m.missing[i])})" for i in worst)
    more = f" and {idx.size - worst.size} more" if idx.size > worst.size else ""
    return InputError(
        f"input: missing or non-finite values in {idx.size} feature(s): {listed}{more}; "
        'set input.missing = "drop-rows" or "impute-mean", or clean the data'
    )


def _named(plan: Plan, mask: np.ndarray) -> str:
    idx = np.flatnonzero(mask)
    more = f" and {idx.size - 5} more" if idx.size > 5 else ""
    return ", ".join(plan.features[i] for i in idx[:5]) + more


def _check_finite(plan: Plan, m: Moments, center: bool) -> None:
    """Refuse moments that overflowed float64 (values near 1e154 and beyond square past 1.8e308)."""
    diag = np.diag(m.m2) if m.full else m.m2
    bad = ~np.isfinite(m.mean) | ~np.isfinite(diag)
    if m.full:
        bad |= ~np.isfinite(np.triu(m.m2)).all(axis=0) | ~np.isfinite(np.triu(m.m2)).all(axis=1)
    if not center:  # the second moment about zero squares the mean too
        with np.errstate(over="ignore"):
            bad |= ~np.isfinite(m.mean**2 * m.n)
    if bad.any():
        raise InputError(
            f"input: feature(s) {_named(plan, bad)} hold values too large for float64 arithmetic: "
            "their sums of squares overflow (beyond about 1.8e308, i.e. values of about 1e150 or more); "
            "rescale them (divide by a power of ten) or leave them out with input.exclude"
        )


def moments_pass(cfg, plan: Plan, passes, full: bool) -> Moments:
    """The moments pass (a second one for impute-mean), screened by :func:`screened`."""
    mode = cfg.input.missing
    return screened(cfg, plan, passes.moments(full, mode), lambda fill: passes.moments(full, mode, fill=fill))


def screened(cfg, plan: Plan, first: Moments, again) -> Moments:
    """Apply the missing rule to the moments of a pass; ``again(fill)`` recomputes them with a fill (impute-mean).

    Raises
    ------
    InputError
        Missing values under ``fail``, a feature with nothing to impute,
        weights that leave nothing to fit, overflow, or fewer than 2 rows.
    """
    mode = cfg.input.missing
    m = first
    if m.missing.any():
        if mode == "fail":
            raise _missing_error(plan, m)
        log.info("missing values in %d feature(s): %s", int((m.missing > 0).sum()), mode)
        if mode == "impute-mean":
            empty = m.valid_n == 0
            if empty.any():
                raise InputError(
                    f"input: feature(s) {_named(plan, empty)} have no finite value in any of the "
                    f"{m.rows_seen} rows, so input.missing = \"impute-mean\" has no mean to fill in; "
                    "leave them out with input.exclude"
                )
            m = again(m.valid_mean)
    if m.weight is not None:
        check_total_weight(plan, m)
    _check_finite(plan, m, cfg.model.center)
    if m.n < 2:
        raise InputError(f"input: {m.n} row(s) left after input.missing = {mode!r}; PCA needs at least 2 rows: "
                         'use input.missing = "impute-mean" or clean the data')
    return m


def preprocessing(cfg, plan: Plan, m: Moments) -> tuple[Transform, np.ndarray, np.ndarray]:
    """The per-feature shift and scale, and the transform the tasks apply."""
    std = np.sqrt(m.variance())
    mean = m.mean
    if cfg.model.scale:
        flat = std <= 8 * np.finfo(float).eps * np.maximum(np.abs(mean), 1e-300)
        if flat.any():
            names = [plan.features[i] for i in np.flatnonzero(flat)[:5]]
            raise InputError(
                f"input: feature(s) {', '.join(names)} are constant ({int(flat.sum())} in all) and cannot "
                "be scaled to unit variance; leave them out with input.exclude or set model.scale = false"
            )
        scale_used = std
    else:
        scale_used = np.ones_like(std)
    mc = cfg.model
    transform = transform_for(mean, scale_used, center=mc.center, scale=mc.scale,
                              feature_weights=plan.feature_weights,
                              missing=missing_rule(cfg.input.missing, seen=bool(m.missing.any())))
    return transform, std, scale_used
