"""Find the input files: ``input.paths`` entries (files, directories, globs) -> real Parquet files.

Two rules keep a dataset from being read wrongly:

* Names starting with ``_`` or ``.`` below a directory or a glob are skipped, as
  Parquet dataset readers do: writers keep their scratch there (Spark and Hadoop
  leave ``_temporary/.../part-*.parquet`` and ``_SUCCESS``; editors and sync
  tools leave hidden files).  A name the user spelled out literally is read.
* Every real file is read once: files reached twice (the same path written
  twice, a symlink, a hardlink) are recognised by device and inode, not by the
  spelling of the path.
"""

from __future__ import annotations

import glob
import logging
import os
from dataclasses import dataclass

from .errors import InputError

log = logging.getLogger("pcapipe")

__all__ = ["Inputs", "find_inputs", "resolve_inputs"]

_SKIP = ("_", ".")


@dataclass(frozen=True)
class Inputs:
    """The files found, and what was left out (for ``pcapipe check`` and the log).

    ``skipped``: Parquet files left out because a part of their path below the
    named directory or glob starts with ``_`` or ``.``.  ``duplicates``: pairs
    ``(path, same_as)`` of a second spelling of a file already found.
    """

    files: tuple[str, ...]
    skipped: tuple[str, ...]
    duplicates: tuple[tuple[str, str], ...]


def _hidden(part: str) -> bool:
    return part.startswith(_SKIP)


def _walk(top: str, files: list, skipped: list) -> None:
    """Every ``*.parquet`` below ``top``, following directory symlinks once each."""
    seen = set()
    for root, dirs, names in os.walk(top, followlinks=True):
        st = os.stat(root)
        if (st.st_dev, st.st_ino) in seen:  # a symlink loop, or a directory reached twice
            dirs[:] = []
            continue
        seen.add((st.st_dev, st.st_ino))
        for name in sorted(names):
            if name.endswith(".parquet"):
                (skipped if _hidden(name) else files).append(os.path.join(root, name))
        for name in [n for n in dirs if _hidden(n)]:
            for sub, _, below in os.walk(os.path.join(root, name), followlinks=False):
                skipped += [os.path.join(sub, b) for b in below if b.endswith(".parquet")]
        dirs[:] = sorted(n for n in dirs if not _hidden(n))


def _glob_hit_hidden(hit: str, pattern: str) -> bool:
    """A part of ``hit`` matched by a wildcard starts with ``_`` or ``.`` (and the pattern did not ask for it)."""
    parts = pattern.split(os.sep)
    magic = next(i for i, s in enumerate(parts) if glob.has_magic(s))
    asked = {p[0] for p in parts[magic:] if p and p[0] in _SKIP}
    below = os.path.relpath(hit, os.sep.join(parts[:magic]) or os.sep).split(os.sep)
    return any(_hidden(p) and p[0] not in asked for p in below)


def _expand(path: str, files: list, skipped: list) -> None:
    magic = glob.has_magic(path)
    for hit in sorted(glob.glob(path, recursive=True)) if magic else [path]:
        if magic and _glob_hit_hidden(hit, path):
            if os.path.isdir(hit):
                _walk(hit, skipped, skipped)
            elif hit.endswith(".parquet"):
                skipped.append(hit)
        elif os.path.isdir(hit):
            _walk(hit, files, skipped)
        elif os.path.isfile(hit):
            files.append(hit)


def find_inputs(patterns, base_dir: str) -> Inputs:
    """Resolve files, directories and globs to the sorted, distinct Parquet files they name.

    Directories, named or matched by a glob, contribute every ``*.parquet``
    file below them (a dataset written as ``table.parquet/part-*.parquet`` is
    a directory).  Each pattern must match at least one file, so a typo is
    not silently ignored.

    Raises
    ------
    InputError
        A pattern matches no file.
    """
    found: list[str] = []
    skipped: list[str] = []
    for pattern in patterns:
        path = os.path.join(base_dir, os.path.expanduser(pattern))
        files: list[str] = []
        before = len(skipped)
        _expand(path, files, skipped)
        if not files:
            left = len(skipped) - before
            why = f"; {left} file(s) under names starting with _ or . were skipped" if left else ""
            raise InputError(
                f"input.paths: {pattern!r} matches no file (looked for {path}{why}); check the path, or "
                "write it relative to the config file's directory"
            )
        found += [os.path.abspath(f) for f in files]
    spellings: dict[tuple[int, int], list[str]] = {}
    for f in sorted(set(found)):
        st = os.stat(f)
        spellings.setdefault((st.st_dev, st.st_ino), []).append(f)
    distinct: dict[tuple[int, int], str] = {}
    duplicates = []
    for key, names in spellings.items():
        # the file's own name rather than a symlink to it; then the first in sorted order
        distinct[key] = min(names, key=lambda f: (os.path.islink(f), f))
        duplicates += [(f, distinct[key]) for f in names if f != distinct[key]]
    duplicates.sort()
    inputs = Inputs(tuple(sorted(distinct.values())), tuple(sorted(set(map(os.path.abspath, skipped)))),
                    tuple(duplicates))
    if inputs.skipped:
        log.info("input.paths: skipped %d Parquet file(s) under names starting with _ or . (writers' "
                 "leftovers, e.g. %s)", len(inputs.skipped), inputs.skipped[0])
    for path, same in inputs.duplicates:
        log.info("input.paths: %s is the same file as %s (symlink or hardlink); read once", path, same)
    return inputs


def resolve_inputs(patterns, base_dir: str) -> list[str]:
    """The files of :func:`find_inputs`, as a sorted list of absolute paths."""
    return list(find_inputs(patterns, base_dir).files)
