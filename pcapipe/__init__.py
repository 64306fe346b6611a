"""pcapipe: leading principal components of Parquet datasets larger than memory.

    import pcapipe
    res = pcapipe.run("configs/demo.toml")   # or a dict of the same shape
    res = pcapipe.load("runs/demo")
    res.loadings, res.spectrum, res.features, res.scores()
"""

from ._version import __version__
from .engine import run
from .errors import (
    ClusterError,
    ConfigError,
    InputError,
    NotConvergedWarning,
    OutputError,
    PcapipeError,
    ResumeError,
    RunDirectoryError,
)
from .result import Result, load

__all__ = [
    "__version__",
    "run",
    "load",
    "Result",
    "PcapipeError",
    "ConfigError",
    "InputError",
    "OutputError",
    "ClusterError",
    "ResumeError",
    "RunDirectoryError",
    "NotConvergedWarning",
]
