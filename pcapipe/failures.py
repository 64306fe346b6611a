"""What a failed run leaves on disk and what it says.

Three kinds of failure keep the checkpoint of :mod:`pcapipe.checkpoint`, when
it holds at least one finished pass over the data (otherwise there is nothing
it would spare, and the ``.incomplete`` directory is removed):

* Ctrl-C (exit status 130): a warning names the checkpoint and the command
  that continues the run;
* a compute cluster lost in the middle of the run
  (:class:`~pcapipe.errors.InfrastructureError`, exit status 3): the error
  line ends with the same command;
* a full disk (``ENOSPC``/``EDQUOT``): an :class:`~pcapipe.errors.OutputError`
  (exit status 2) saying how much to free; every partial output (score parts,
  tables, temporary files) is removed first, so the disk is not kept full.

Any other error removes the ``.incomplete`` directory unless a checkpoint was
already written (a bug found after hours of passes must not throw them away).
"""

from __future__ import annotations

import contextlib
import errno
import logging
import math
import os
import shlex
import shutil

from .checkpoint import Checkpoint
from .config import format_size
from .errors import InfrastructureError, OutputError
from .writer import MARKER

__all__ = ["resume_command", "is_disk_full", "settle"]

log = logging.getLogger("pcapipe")

_FULL = (errno.ENOSPC, errno.EDQUOT)


def resume_command(source: str, overrides=()) -> str:
    """The command that continues an interrupted run of the config at ``source``.

    The other ``--set`` overrides are stored with the checkpoint; only
    ``output.directory`` is needed again, to find it.
    """
    if source == "<dict>":
        return "pcapipe.run(config, resume=True) with the same config"
    words = ["pcapipe", "run", source, "--resume"]
    for item in overrides:
        if str(item).partition("=")[0].strip() == "output.directory":
            words += ["--set", str(item)]
    return shlex.join(words)


def is_disk_full(e: BaseException) -> bool:
    """Whether ``e`` (or what caused it) is a write that found no space left."""
    seen = set()
    while e is not None and id(e) not in seen:
        seen.add(id(e))
        if isinstance(e, OSError) and (e.errno in _FULL or "No space left on device" in str(e)
                                       or "Disk quota exceeded" in str(e)):
            return True
        e = e.__cause__ or e.__context__
    return False


def _free_bytes(path: str) -> int:
    while path and not os.path.exists(path):
        path = os.path.dirname(path)
    st = os.statvfs(path or ".")
    return st.f_bavail * st.f_frsize


def _outputs_estimate(p, ckpt: Checkpoint) -> int:
    """Bytes the remaining outputs need: scores (float64 per component, t2, spe and keep column per row)."""
    k = p.cfg.model.components if isinstance(p.cfg.model.components, int) else p.plan.n_features
    with contextlib.suppress(OSError, KeyError, ValueError):
        k = len(ckpt.solution()["values"])
    per_row = 8 * (k + 4 + len(p.plan.keep)) if p.cfg.output.scores else 0
    tables = 8 * p.plan.n_features * (k + 8) + (1 << 20)  # loadings, features, spectrum, manifest
    return p.plan.n_rows * per_row + tables


def _clear_outputs(partial: str) -> None:
    """Remove everything in ``partial`` but the checkpoint (and the marker saying it is ours)."""
    for name in os.listdir(partial):
        if name in ("checkpoint", MARKER):
            continue
        path = os.path.join(partial, name)
        if os.path.isdir(path) and not os.path.islink(path):
            shutil.rmtree(path, ignore_errors=True)
        else:
            with contextlib.suppress(OSError):
                os.unlink(path)


def _kept(ckpt: Checkpoint, command: str) -> str:
    passes = int(ckpt.state.get("passes", 0))
    return (f"the checkpoint of the {passes} pass(es) over the data already done ({format_size(ckpt.size())}) "
            f"is kept in {ckpt.dir}; continue with: {command}")


def settle(p, ckpt: Checkpoint, e: BaseException, overrides=()) -> BaseException | None:
    """Clean up after the run of ``p`` failed with ``e``.

    Returns
    -------
    BaseException or None
        The error to raise instead of ``e`` (with what was kept and the
        command to continue), or None to raise ``e`` itself.
    """
    partial = p.writer.partial
    useful = ckpt.exists and int(ckpt.state.get("passes", 0)) > 0
    full = isinstance(e, Exception) and is_disk_full(e)
    command = resume_command(p.cfg.source, overrides)
    if full or not useful:
        if useful:
            _clear_outputs(partial)
        else:
            shutil.rmtree(partial, ignore_errors=True)
    if full:
        where = os.path.dirname(p.writer.directory) or "."
        need = _outputs_estimate(p, ckpt) - _free_bytes(where)
        tail = (_kept(ckpt, command) + " once there is room") if useful else "nothing was kept"
        return OutputError(f"no space left on {where}: free {math.ceil(max(need, 1e6) / 1e6)} MB or choose "
                           f"another output.directory; {tail}")
    if isinstance(e, InfrastructureError):
        tail = (_kept(ckpt, command) + " once the cluster is back") if useful else \
            "nothing was kept: run the same command again once the cluster is back"
        return InfrastructureError(f"{e}; {tail}")
    if isinstance(e, KeyboardInterrupt) and useful:
        log.warning("interrupted; %s", _kept(ckpt, command))
    return None
