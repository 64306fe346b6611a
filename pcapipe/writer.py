"""Write a run directory atomically.

Everything is written into a sibling ``<directory>.incomplete``; the manifest
is written last, and the sibling is then renamed into place.  A crash at any
moment leaves either no run directory or a complete one; the sibling holds the
partial state (and the checkpoint ``--resume`` uses).
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile

import pyarrow as pa
import pyarrow.parquet as pq

from .errors import OutputError

__all__ = ["RunWriter", "FORMAT_VERSION", "write_json_atomic", "partial_dir_for"]

FORMAT_VERSION = 1


def partial_dir_for(directory: str) -> str:
    """The sibling that holds an unfinished run of ``directory``."""
    return os.path.normpath(directory) + ".incomplete"


def write_json_atomic(path: str, obj) -> None:
    """Write JSON to ``path`` through a temporary file and a rename."""
    d = os.path.dirname(path) or "."
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", suffix=".json", dir=d)
    try:
        with os.fdopen(fd, "w") as f:
            json.dump(obj, f, indent=2, sort_keys=False, default=_json_default)
            f.write("\n")
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, 0o644)  # mkstemp makes it private; a run directory is meant to be shared
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _json_default(o):
    import numpy as np

    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, np.floating):
        return float(o)
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, np.bool_):
        return bool(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


class RunWriter:
    """Owns the final run directory and its ``.incomplete`` sibling.

    Parameters
    ----------
    directory : str
        Absolute path of the run directory to produce.
    overwrite : bool
        Replace an existing run directory (only once the new one is complete).
    """

    def __init__(self, directory: str, overwrite: bool):
        self.directory = os.path.normpath(directory)
        self.overwrite = overwrite
        self.partial = partial_dir_for(self.directory)

    def check(self) -> None:
        """Refuse early (before any data is read) when the output is in the way or not writable."""
        if os.path.exists(self.directory) and not self.overwrite:
            raise OutputError(
                f"output.directory: {self.directory} already exists; set output.overwrite = true "
                "or choose another directory"
            )
        if os.path.exists(self.directory) and not os.path.isdir(self.directory):
            raise OutputError(f"output.directory: {self.directory} exists and is not a directory")
        parent = os.path.dirname(self.directory) or "."
        probe = parent
        while not os.path.exists(probe):
            probe = os.path.dirname(probe) or "."
        if not os.access(probe, os.W_OK | os.X_OK) or not os.path.isdir(probe):
            raise OutputError(
                f"output.directory: cannot create {self.directory} ({probe} is not writable); "
                "choose a directory you can write to"
            )

    def start(self, keep_partial: bool = False) -> None:
        """Create the ``.incomplete`` sibling (emptied unless resuming)."""
        if os.path.exists(self.partial) and not keep_partial:
            shutil.rmtree(self.partial)
        try:
            os.makedirs(self.partial, exist_ok=True)
        except OSError as e:
            raise OutputError(f"output.directory: cannot create {self.partial}: {e.strerror}") from e

    def path(self, *parts: str) -> str:
        return os.path.join(self.partial, *parts)

    def write_table(self, name: str, table: pa.Table) -> None:
        tmp = self.path(name + ".tmp")
        pq.write_table(table, tmp, compression="zstd")
        os.replace(tmp, self.path(name))

    def write_bytes(self, name: str, data: bytes) -> None:
        tmp = self.path(name + ".tmp")
        with open(tmp, "wb") as f:
            f.write(data)
        os.replace(tmp, self.path(name))

    def finish(self, manifest: dict) -> str:
        """Write the manifest last, then rename the sibling into place."""
        for leftover in ("checkpoint",):
            p = self.path(leftover)
            if os.path.isdir(p):
                shutil.rmtree(p)
        write_json_atomic(self.path("manifest.json"), manifest)
        old = None
        if os.path.exists(self.directory):
            old = tempfile.mkdtemp(prefix=os.path.basename(self.directory) + ".replaced-",
                                   dir=os.path.dirname(self.directory) or ".")
            os.rmdir(old)
            os.replace(self.directory, old)
        os.replace(self.partial, self.directory)
        if old:
            shutil.rmtree(old, ignore_errors=True)
        return self.directory
