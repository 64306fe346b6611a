"""Open a finished run directory in a notebook: :func:`load` and :class:`Result`.

Only JSON and Parquet are read (never pickle).  ``load`` refuses a manifest
whose format version it does not know, and checks that the listed files exist
and agree with the manifest, so an edited or truncated run directory gives a
clear error instead of wrong numbers.
"""

from __future__ import annotations

import glob
import json
import os
from functools import cached_property

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import InputError, RunDirectoryError
from .plan import feature_names_for
from .reader import ReadSpec, batch_to_array
from .writer import FORMAT_VERSION

__all__ = ["Result", "load"]

_FILES = ("manifest.json", "components.parquet", "loadings.parquet", "features.parquet")


def load(directory) -> "Result":
    """Open the run directory ``directory``.

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
    for name in _FILES:
        if not os.path.isfile(os.path.join(directory, name)):
            raise RunDirectoryError(f"{directory}: {name} is missing; this is not a complete run directory")
    try:
        with open(os.path.join(directory, "manifest.json")) as f:
            manifest = json.load(f)
    except (OSError, json.JSONDecodeError) as e:
        raise RunDirectoryError(f"{directory}/manifest.json: not valid JSON ({e})") from e
    version = manifest.get("format_version") if isinstance(manifest, dict) else None
    if version != FORMAT_VERSION:
        raise RunDirectoryError(
            f"{directory}/manifest.json: format_version {version!r} is not one this pcapipe reads "
            f"({FORMAT_VERSION}); open it with the pcapipe version that wrote it"
        )
    result = Result(directory, manifest)
    result._validate()
    return result


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
    def components(self) -> pd.DataFrame:
        """One row per component (index PC1..PCk): variance, ratios, residuals, std errors."""
        return _read(self.directory, "components.parquet").set_index("component")

    @cached_property
    def loadings(self) -> pd.DataFrame:
        """Unit-norm eigenvectors: index = feature, columns PC1..PCk."""
        return _read(self.directory, "loadings.parquet").set_index("feature")

    @cached_property
    def features(self) -> pd.DataFrame:
        """Per feature: mean, std, scale_used, missing count."""
        return _read(self.directory, "features.parquet").set_index("feature")

    @property
    def explained_variance(self) -> pd.Series:
        return self.components["explained_variance"]

    @property
    def explained_variance_ratio(self) -> pd.Series:
        return self.components["explained_variance_ratio"]

    @property
    def n_components(self) -> int:
        return int(self.manifest["n_components"])

    def _validate(self) -> None:
        m = self.manifest
        try:
            k, d = int(m["n_components"]), int(m["n_features"])
        except (KeyError, TypeError, ValueError) as e:
            raise RunDirectoryError(f"{self.directory}/manifest.json: lacks n_components/n_features") from e
        names = [f"PC{i + 1}" for i in range(k)]
        checks = [
            ("components.parquet", self.components.shape[0] == k and list(self.components.index) == names),
            ("loadings.parquet", self.loadings.shape == (d, k) and list(self.loadings.columns) == names),
            ("features.parquet", self.features.shape[0] == d and list(self.features.index) == list(self.loadings.index)),
        ]
        for name, ok in checks:
            if not ok:
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

    def _spec(self, n_rows_hint: int = 65536) -> ReadSpec:
        cfg = self.manifest["config"]["input"]
        vec = cfg.get("vector_column", "")
        feats = list(self.loadings.index)
        columns = (vec,) if vec else tuple(feats)
        return ReadSpec(columns, vec, len(feats), n_rows_hint, tuple(cfg.get("keep", ())))

    def _transform(self):
        from .tasks import Transform

        model = self.manifest["config"]["model"]
        f = self.features
        shift = f["mean"].to_numpy() if model.get("center", True) else np.zeros(len(f))
        inv = 1.0 / f["scale_used"].to_numpy() if model.get("scale", False) else None
        mode = {"fail": "fail", "drop-rows": "drop", "impute-mean": "zero"}[self.manifest["config"]["input"]["missing"]]
        return Transform(shift, inv, mode)

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
        pandas.DataFrame for a DataFrame; dask DataFrame for paths.
        """
        from .project import project_frame, project_paths

        if isinstance(data, pd.DataFrame):
            return project_frame(self, data, keep)
        return project_paths(self, data, keep)

    # -- display -------------------------------------------------------------
    def summary(self) -> pd.DataFrame:
        cols = ["explained_variance", "explained_variance_ratio", "cumulative_ratio", "residual_norm", "std_error"]
        return self.components[cols]

    def __repr__(self) -> str:
        m = self.manifest
        head = (f"pcapipe.Result({self.directory!r}: {m['n_samples']} rows x {m['n_features']} features, "
                f"{m['n_components']} components, method {m['method']}, "
                f"{'converged' if m['converged'] else 'NOT converged'})")
        return head + "\n" + self.summary().to_string(float_format=lambda v: f"{v:.6g}")
