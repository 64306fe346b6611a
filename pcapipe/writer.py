"""Write a run directory atomically, and never anywhere it could destroy data.

Everything is written into a sibling ``<directory>.incomplete``; the manifest
is written last, and the sibling is then renamed into place.  A crash at any
moment leaves either no run directory or a complete one; the sibling holds the
partial state (and the checkpoint ``--resume`` uses).

Before anything is written the output is checked against the inputs and the
config file (it may neither equal, contain nor lie inside them), and a
directory in the way is replaced only when it is a run of pcapipe: it holds our
manifest, our checkpoint or the marker file :data:`MARKER` that the
``.incomplete`` sibling carries from its creation.
"""

from __future__ import annotations

import glob
import json
import os
import shutil
import tempfile
from fnmatch import fnmatchcase

import pyarrow as pa
import pyarrow.parquet as pq

from .errors import OutputError

__all__ = ["path_inside", "RunWriter", "FORMAT_VERSION", "MARKER", "write_json_atomic", "partial_dir_for", "is_pcapipe_run"]

FORMAT_VERSION = 2  # 2: spectrum.parquet and the manifest keys rows/features (issue 12)
# Created first in every .incomplete sibling: proof that the directory is ours to delete.
MARKER = ".pcapipe-incomplete"
# Names a finished run holds, used to ask whether an input glob would find them.
_OUTPUT_SAMPLES = ("manifest.json", "loadings.parquet", os.path.join("scores", "part-00000.parquet"))


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


def is_pcapipe_run(directory: str) -> bool:
    """True when ``directory`` holds a pcapipe manifest, checkpoint or ``.incomplete`` marker."""
    if os.path.isfile(os.path.join(directory, MARKER)):
        return True
    if os.path.isfile(os.path.join(directory, "checkpoint", "state.json")):
        return True
    try:
        with open(os.path.join(directory, "manifest.json")) as f:
            manifest = json.load(f)
    except (OSError, ValueError):
        return False
    return isinstance(manifest, dict) and "format_version" in manifest and "config" in manifest


def _contents(directory: str, limit: int = 5) -> str:
    """What a directory holds, for a message: a few names, directories with a slash."""
    try:
        names = sorted(os.listdir(directory))
    except OSError as e:
        return f"unreadable: {e.strerror}"
    shown = [n + ("/" if os.path.isdir(os.path.join(directory, n)) else "") for n in names[:limit]]
    more = f", ... ({len(names)} entries)" if len(names) > limit else ""
    return ", ".join(shown) + more


def path_inside(path: str, root: str) -> bool:
    """``path`` equals ``root`` or lies below it (both absolute and normalised)."""
    return path == root or path.startswith(root.rstrip(os.sep) + os.sep)


def _spellings(path: str) -> set[str]:
    # a path reached through a symlink is inside a directory under either spelling
    return {os.path.normpath(os.path.abspath(path)), os.path.realpath(path)}


def _segments(path: str) -> list[str]:
    return [s for s in path.split(os.sep) if s]


def _glob_matches(pattern: list[str], path: list[str]) -> bool:
    """Segment-wise glob match as ``glob(recursive=True)`` does it: ``**`` spans any depth."""
    if not pattern:
        return not path
    head, rest = pattern[0], pattern[1:]
    if head == "**":
        return any(_glob_matches(rest, path[i:]) for i in range(len(path) + 1))
    return bool(path) and fnmatchcase(path[0], head) and _glob_matches(rest, path[1:])


def _literal_root(pattern: str) -> tuple[str, list[str]]:
    """The directory before a glob's first magic segment, and the segments from there on."""
    parts = _segments(os.path.normpath(pattern))
    magic = next(i for i, s in enumerate(parts) if glob.has_magic(s))
    return os.sep + os.path.join(*parts[:magic]) if magic else os.sep, parts[magic:]


def _glob_reaches(pattern: str, out: str) -> bool:
    """Would the glob find ``out``, a directory above it, or the files a run writes there?"""
    literal, rest = _literal_root(pattern)
    pat = _segments(os.path.realpath(literal)) + rest
    target = _segments(out)
    if any(_glob_matches(pat, target[:i]) for i in range(1, len(target) + 1)):
        return True  # a matched directory is read whole, the run's files included
    return any(_glob_matches(pat, _segments(os.path.join(out, name))) for name in _OUTPUT_SAMPLES)


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

    def check_overlap(self, patterns, config_file: str | None) -> None:
        """Refuse an output that equals, contains or lies inside an input path or the config's directory.

        Parameters
        ----------
        patterns : sequence of str
            The ``input.paths`` entries as absolute paths (globs allowed), before expansion.
        config_file : str or None
            The config file's absolute path (None for a config given as a mapping).

        Raises
        ------
        OutputError
            Naming the input or config path in the way; checked before any input is read.
        """
        for out in {os.path.realpath(self.directory), os.path.realpath(self.partial)}:
            for pattern in patterns:
                if glob.has_magic(pattern):
                    if any(path_inside(p, out) for p in _spellings(_literal_root(pattern)[0])):
                        raise self._overlap(f"contains the input path {pattern}")
                    if _glob_reaches(pattern, out):
                        raise self._overlap(f"lies where the input pattern {pattern} would find its "
                                            "files (the run's own Parquet files would be read as input)")
                    continue
                for p in _spellings(pattern):
                    if path_inside(p, out):
                        raise self._overlap(f"{'is' if p == out else 'contains'} the input path {pattern}")
                    if os.path.isdir(p) and path_inside(out, p):
                        raise self._overlap(f"lies inside the input directory {pattern} (the run's own "
                                            "Parquet files would be read as input)")
            if config_file and any(path_inside(p, out) for p in _spellings(config_file)):
                raise OutputError(
                    f"output.directory: {self.directory} contains the config file {config_file}; "
                    "choose an output.directory that does not hold the config file"
                )

    def check_inputs(self, files) -> None:
        """After expansion: no input file (under any spelling) may lie inside the output."""
        for out in {os.path.realpath(self.directory), os.path.realpath(self.partial)}:
            for f in files:
                if any(path_inside(p, out) for p in _spellings(f)):
                    raise self._overlap(f"contains the input file {f}")

    def _overlap(self, what: str) -> OutputError:
        return OutputError(f"output.directory: {self.directory} {what}; a run there could overwrite or "
                           "delete the input: choose an output.directory outside every input path")

    def check(self) -> None:
        """Refuse early (before any data is read) when the output is in the way or not writable."""
        self._check_partial()
        if os.path.lexists(self.directory):
            if not os.path.isdir(self.directory):
                raise OutputError(f"output.directory: {self.directory} exists and is not a directory; "
                                  "choose another output.directory")
            empty = not os.listdir(self.directory)
            if not empty and not is_pcapipe_run(self.directory):
                raise OutputError(
                    f"output.directory: {self.directory} already exists and is not a pcapipe run "
                    f"(it holds {_contents(self.directory)}); output.overwrite = true replaces only a "
                    "run directory of pcapipe: choose another output.directory, or move that one away"
                )
            if not self.overwrite:
                raise OutputError(
                    f"output.directory: {self.directory} already exists; set output.overwrite = true "
                    "or choose another directory"
                )
        parent = os.path.dirname(self.directory) or "."
        probe = parent
        while not os.path.exists(probe):
            probe = os.path.dirname(probe) or "."
        if not os.access(probe, os.W_OK | os.X_OK) or not os.path.isdir(probe):
            raise OutputError(
                f"output.directory: cannot create {self.directory} ({probe} is not writable); "
                "choose a directory you can write to"
            )

    def _check_partial(self) -> None:
        """The ``.incomplete`` sibling, when present, must be an (empty or) unfinished pcapipe run."""
        if not os.path.lexists(self.partial):
            return
        if not os.path.isdir(self.partial) or os.path.islink(self.partial):
            raise OutputError(
                f"output.directory: {self.partial} is in the way: pcapipe keeps an unfinished run there, "
                "but it is a file, not a directory; move or delete it, or choose another output.directory"
            )
        if os.listdir(self.partial) and not is_pcapipe_run(self.partial):
            raise OutputError(
                f"output.directory: {self.partial} is in the way: pcapipe keeps an unfinished run there, "
                f"but it holds {_contents(self.partial)}, not written by pcapipe; move it away, or choose "
                "another output.directory"
            )

    def start(self, keep_partial: bool = False) -> None:
        """Create the ``.incomplete`` sibling (emptied unless resuming) with its marker."""
        self._check_partial()
        if os.path.exists(self.partial) and not keep_partial:
            shutil.rmtree(self.partial)
        try:
            os.makedirs(self.partial, exist_ok=True)
            with open(os.path.join(self.partial, MARKER), "w") as f:
                f.write("an unfinished pcapipe run; removed when it is complete\n")
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
        if os.path.exists(self.path(MARKER)):
            os.unlink(self.path(MARKER))  # the manifest now says what this directory is
        old = None
        if os.path.exists(self.directory):
            if os.listdir(self.directory) and not is_pcapipe_run(self.directory):
                raise OutputError(f"output.directory: {self.directory} was filled by something else during "
                                  f"the run; the complete result is in {self.partial}")
            old = tempfile.mkdtemp(prefix=os.path.basename(self.directory) + ".replaced-",
                                   dir=os.path.dirname(self.directory) or ".")
            os.rmdir(old)
            os.replace(self.directory, old)
        os.replace(self.partial, self.directory)
        if old and os.path.islink(old):
            os.unlink(old)  # the output was a link to a run: replace the link, keep what it pointed to
        elif old:
            shutil.rmtree(old, ignore_errors=True)
        return self.directory
