"""Open a finished run directory in a notebook: :func:`load` and :class:`Result`.

Only JSON and Parquet are read (never pickle).  ``load`` refuses a manifest
whose format version it does not know, and checks that the listed files exist
and agree with the manifest, so an edited or truncated run directory gives a
clear error instead of wrong numbers.
"""

from __future__ import annotations

import glob
import html
import json
import os
from functools import cached_property

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .conventions import about_zero, analysed_factor
from .errors import RunDirectoryError
from .writer import FORMAT_VERSION

__all__ = ["Result", "load", "READABLE_VERSIONS"]

_TABLES = ("loadings.parquet", "features.parquet")
_SPECTRUM_FILE = {1: "components.parquet", 2: "spectrum.parquet"}  # per format version
READABLE_VERSIONS = tuple(sorted(_SPECTRUM_FILE))
assert FORMAT_VERSION in READABLE_VERSIONS
# Format version 1 (the first release) used other names for the same things.
_V1_MANIFEST = {"n_samples": "rows", "n_features": "features", "n_components": "components",
                "n_rows_read": "rows_read"}
_V1_SPECTRUM = {"explained_variance": "eigenvalue", "explained_variance_ratio": "share",
                "cumulative_ratio": "cumulative_share", "residual_norm": "residual"}
_SUMMARY = ["eigenvalue", "share", "cumulative_share", "residual", "std_error", "retained"]
_REPR_ROWS = 5  # components listed in the one-line repr
_HTML_ROWS = 20  # components shown in the notebook table


def load(directory) -> "Result":
    """Open the run directory ``directory``.

    Directories of the previous format version (1) are read too: their
    manifest keys and spectrum columns are given the current names in memory
    (the files are not changed).

    Raises
    ------
    RunDirectoryError
        Missing files, an unknown format version, or contents that disagree
        with the manifest.
    """
    directory = os.path.abspath(os.fspath(directory))
    if not os.path.isdir(directory):
        hint = " (an unfinished run is in the .incomplete sibling; finish it with --resume)" \
            if os.path.isdir(directory + ".incomplete") else ""
        raise RunDirectoryError(f"{directory}: no such run directory{hint}")
    if not os.path.isfile(os.path.join(directory, "manifest.json")):
        raise RunDirectoryError(f"{directory}: manifest.json is missing; this is not a complete run directory")
    try:
        with open(os.path.join(directory, "manifest.json")) as f:
            manifest = json.load(f)
    except (OSError, json.JSONDecodeError) as e:
        raise RunDirectoryError(f"{directory}/manifest.json: not valid JSON ({e})") from e
    version = manifest.get("format_version") if isinstance(manifest, dict) else None
    if version not in READABLE_VERSIONS or isinstance(version, bool):
        raise RunDirectoryError(
            f"{directory}/manifest.json: format_version {version!r} is not one this pcapipe reads "
            f"({', '.join(map(str, READABLE_VERSIONS))}); open it with the pcapipe version that wrote it, "
            "or run the job again"
        )
    for name in (_SPECTRUM_FILE[version], *_TABLES):
        if not os.path.isfile(os.path.join(directory, name)):
            raise RunDirectoryError(f"{directory}: {name} is missing; this is not a complete run directory")
    result = Result(directory, _upgrade_manifest(manifest))
    result._validate()
    return result


def _upgrade_manifest(manifest: dict) -> dict:
    """The manifest with the current key names (a version-1 manifest renamed; others unchanged)."""
    if manifest.get("format_version") != 1:
        return manifest
    return {_V1_MANIFEST.get(key, key): value for key, value in manifest.items()}


def _read(directory: str, name: str) -> pd.DataFrame:
    try:
        return pq.read_table(os.path.join(directory, name)).to_pandas()
    except (OSError, pa.ArrowException) as e:
        raise RunDirectoryError(f"{directory}/{name}: cannot be read ({e}); the run directory is damaged") from e


class Result:
    """The outputs of one run.

    Attributes
    ----------
    directory : str
    manifest : dict
    """

    def __init__(self, directory: str, manifest: dict):
        self.directory = directory
        self.manifest = manifest

    # -- tables --------------------------------------------------------------
    @cached_property
    def spectrum(self) -> pd.DataFrame:
        """One row per eigenvalue the method determined (index PC1...), largest first.

        Columns: eigenvalue, share (of the total variance), cumulative_share,
        residual ``||C v - theta v||``, std_error, converged, gap, retained
        (True on the first k, the components with loadings and scores).
        """
        version = self.manifest.get("format_version", FORMAT_VERSION)
        table = _read(self.directory, _SPECTRUM_FILE.get(version, _SPECTRUM_FILE[FORMAT_VERSION]))
        if version == 1:
            table = table.rename(columns=_V1_SPECTRUM).drop(columns=["singular_value"], errors="ignore")
            table["retained"] = True  # version 1 stored only the retained components
        return table.set_index("component")

    @cached_property
    def loadings(self) -> pd.DataFrame:
        """Unit-norm eigenvectors: index = feature, columns PC1..PCk."""
        return _read(self.directory, "loadings.parquet").set_index("feature")

    @cached_property
    def features(self) -> pd.DataFrame:
        """Per feature: mean, std, scale_used, missing count."""
        return _read(self.directory, "features.parquet").set_index("feature")

    def _retained(self) -> pd.DataFrame:
        return self.spectrum[self.spectrum["retained"]]

    def _validate(self) -> None:
        m = self.manifest
        try:
            k, d = int(m["components"]), int(m["features"])
        except (KeyError, TypeError, ValueError) as e:
            raise RunDirectoryError(f"{self.directory}/manifest.json: lacks components/features") from e
        spec = self.spectrum
        names = [f"PC{i + 1}" for i in range(len(spec))]
        retained = spec["retained"].to_numpy(dtype=bool) if "retained" in spec else np.zeros(len(spec), bool)
        checks = [
            ("spectrum", k <= len(spec) <= d and list(spec.index) == names
             and retained[:k].all() and not retained[k:].any()),
            ("loadings.parquet", self.loadings.shape == (d, k) and list(self.loadings.columns) == names[:k]),
            ("features.parquet", self.features.shape[0] == d and list(self.features.index) == list(self.loadings.index)),
        ]
        for name, ok in checks:
            if not ok:
                if name == "spectrum":
                    name = _SPECTRUM_FILE.get(m.get("format_version"), _SPECTRUM_FILE[FORMAT_VERSION])
                raise RunDirectoryError(
                    f"{self.directory}/{name}: does not match the manifest ({k} components, {d} features); "
                    "the run directory was edited or truncated, run the job again"
                )
        if m.get("scores", {}).get("written"):
            parts = sorted(glob.glob(os.path.join(self.directory, "scores", "part-*.parquet")))
            if len(parts) != m["scores"]["parts"]:
                raise RunDirectoryError(
                    f"{self.directory}/scores: {len(parts)} part files, the manifest lists "
                    f"{m['scores']['parts']}; the run directory is damaged, run the job again"
                )

    # -- scores and projection ----------------------------------------------
    def scores(self):
        """The stored scores as a dask DataFrame (one partition per input file)."""
        import dask.dataframe as dd

        if not self.manifest.get("scores", {}).get("written"):
            raise RunDirectoryError(f"{self.directory}: this run was made with output.scores = false")
        return dd.read_parquet(sorted(glob.glob(os.path.join(self.directory, "scores", "part-*.parquet"))))

    def project(self, data, keep=None):
        """Scores of new rows with the stored preprocessing and loadings.

        Parameters
        ----------
        data : pandas.DataFrame, or str / list of str
            A DataFrame holding the feature columns (or the vector column), or
            Parquet paths/globs, which are streamed through dask.
        keep : list of str, optional
            Columns copied beside the scores (default: the run's keep columns
            that are present).

        Returns
        -------
        pandas.DataFrame (same index) for a DataFrame; for paths a dask
        DataFrame with one partition per file, rows in file order.

        Raises
        ------
        InputError
            A feature column is missing or not numeric, a path matches
            nothing, or a value is missing and the run used ``missing = "fail"``.
        """
        from .project import project_frame, project_paths

        if isinstance(data, pd.DataFrame):
            return project_frame(self, data, keep)
        return project_paths(self, data, keep)

    # -- monitoring ----------------------------------------------------------
    @property
    def limits(self) -> dict:
        """Control limits at ``monitor.confidence``: ``t2`` (new rows), ``t2_training``, ``spe``,
        with formulas, references and, for an estimated SPE limit, its precision (:mod:`pcapipe.limits`)."""
        if not self.manifest.get("limits"):
            raise RunDirectoryError(f"{self.directory}: this run has no control limits (written by a pcapipe "
                                    "without monitoring); run the job again")
        return self.manifest["limits"]

    def monitor(self, data, keep=None):
        """Scores, ``t2``, ``spe``, ``t2_alarm`` and ``spe_alarm`` of new rows (see :meth:`project`).

        New rows are judged against the T^2 limit for new observations (F
        distribution) and the SPE limit; Parquet paths are streamed, one dask
        task per file.
        """
        self.limits  # noqa: B018  (raises for a run without limits)
        return self.project(data, keep)

    def contributions(self, rows) -> pd.DataFrame:
        """Per-feature contributions to T^2 and SPE (formulas in :mod:`pcapipe.monitor`).

        Parameters
        ----------
        rows : pandas.DataFrame, or sequence of int
            Rows holding the feature columns, or positions (0-based) of
            training rows in scores order, read back from the run's input files.

        Returns
        -------
        pandas.DataFrame
            Columns ``(statistic, feature)``; ``frame["spe"]`` rows sum to the
            SPE, ``frame["t2"]`` rows to the T^2.
        """
        from .explain import contributions_frame, read_rows
        from .project import projector_for

        if not isinstance(rows, pd.DataFrame):
            paths = [f["path"] for f in self.manifest["inputs"]]
            rows = read_rows(paths, np.atleast_1d(np.asarray(rows, dtype=np.int64)), projector_for(self).spec.columns)
        return contributions_frame(self, rows)

    # -- derived tables ------------------------------------------------------
    @cached_property
    def correlation_loadings(self) -> pd.DataFrame:
        """Pearson correlation between each input feature and each component's scores.

        Index = feature, columns PC1..PCk, values in [-1, 1].  For a
        centred PCA with eigenpair ``(lambda_i, v_i)`` of the covariance of the
        analysed data ``a = x / scale_used``, ``cov(a_j, s_i) = lambda_i v_ji``
        and ``var(s_i) = lambda_i``, so the correlation is
        ``v_ji * sqrt(lambda_i) * scale_used_j / std_j``: ``v_ji sqrt(lambda_i)``
        for a correlation PCA, ``v_ji sqrt(lambda_i) / std_j`` for a covariance
        PCA (Jolliffe 2002, *Principal Component Analysis*, 2nd ed., sec. 2.3).
        Without centring the vectors are eigenvectors of the second-moment
        matrix ``M = C + n/(n-1) mu mu^T``, and the same covariances follow from
        ``C v_i = lambda_i v_i - n/(n-1) mu (mu . v_i)``.  A constant feature
        has no correlation (NaN).
        """
        m, f = self.manifest, self.features
        v = self.loadings.to_numpy()
        lam = self._retained()["eigenvalue"].to_numpy()
        # the analysed feature is x * factor: 1 / scale_used, times the feature weight (README "Weights")
        model = m["config"]["model"]
        fw = f["weight"].to_numpy() if "weight" in f and model.get("feature_weights") else None
        factor = analysed_factor(f["scale_used"].to_numpy(), model.get("scale", False), fw)
        factor = np.ones(len(f)) if factor is None else factor
        sd = f["std"].to_numpy() * factor  # std of the analysed feature
        cov = v * lam
        var_s = lam.copy()
        if not m["config"]["model"].get("center", True):
            n = float((m.get("weights") or {}).get("sum") or m["rows"])
            mu = f["mean"].to_numpy() * factor
            proj = mu @ v
            cov = cov - about_zero(n) * np.outer(mu, proj)
            var_s = var_s - about_zero(n) * proj**2
        with np.errstate(divide="ignore", invalid="ignore"):
            r = cov / np.outer(sd, np.sqrt(np.maximum(var_s, 0.0)))
        r[~np.isfinite(r)] = np.nan
        return pd.DataFrame(np.clip(r, -1.0, 1.0), index=self.loadings.index, columns=self.loadings.columns)

    # -- display -------------------------------------------------------------
    def summary(self) -> pd.DataFrame:
        """The spectrum: eigenvalue, share, cumulative share, residual, std error and retained flag."""
        return self.spectrum[_SUMMARY]

    def _headline(self) -> str:
        m = self.manifest
        kind = "correlation" if m["config"]["model"].get("scale") else "covariance"
        state = "converged" if m["converged"] else "NOT all converged"
        return (f"{m['rows']} rows x {m['features']} features, {m['components']} components retained "
                f"({kind} PCA, {m['method']}, {state})")

    def __repr__(self) -> str:
        c = self._retained()
        shown = c.head(_REPR_ROWS)
        listed = ", ".join(f"{name} {r:.1%}" for name, r in shown["share"].items())
        if len(c) > _REPR_ROWS:
            listed += f", ... ({len(c) - _REPR_ROWS} more)"
        total = c["cumulative_share"].iloc[-1] if len(c) else float("nan")
        return (f"<pcapipe.Result {self.directory!r}: {self._headline()}; "
                f"variance explained {listed}; total {total:.1%}>")

    def _repr_html_(self) -> str:
        """A spectrum table for Jupyter: the headline and one row per eigenvalue (at most 20)."""
        from .formats import spectrum_cells

        c = self.summary().head(_HTML_ROWS)
        head = "".join(f"<th>{html.escape(n)}</th>" for n in ("component", "eigenvalue", "share", "cumulative",
                                                              "residual", "std error", "retained"))
        rows = []
        for name, cells in zip(c.index, spectrum_cells(c)):
            rows.append(f"<tr><th>{html.escape(str(name))}</th>" + "".join(f"<td>{x}</td>" for x in cells) + "</tr>")
        more = len(self.spectrum) - len(c)
        tail = f"<p>... {more} more eigenvalues: see <code>.spectrum</code></p>" if more > 0 else ""
        return (f"<div class=\"pcapipe-result\"><p><b>pcapipe.Result</b> <code>{html.escape(self.directory)}"
                f"</code><br>{html.escape(self._headline())}</p><table><thead><tr>{head}</tr></thead><tbody>"
                + "".join(rows) + f"</tbody></table>{tail}</div>")
