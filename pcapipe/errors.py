"""Exception and warning types raised by pcapipe.

Every error a user can fix (bad config, bad input, an output directory in the
way) is a :class:`PcapipeError`; the command line turns it into one
``error: ...`` line and exit status 2, except :class:`InfrastructureError`
(the compute cluster failed in the middle of a run: exit status 3, resumable).
Anything else is a bug (exit 1).
"""

__all__ = [
    "PcapipeError",
    "ConfigError",
    "InputError",
    "OutputError",
    "ClusterError",
    "InfrastructureError",
    "ResumeError",
    "RunDirectoryError",
    "NotConvergedWarning",
]


class PcapipeError(Exception):
    """Base class of the errors a user can act on (exit status 2)."""


class ConfigError(PcapipeError):
    """The configuration is invalid: unknown key, wrong type, bad value, bad TOML."""


class InputError(PcapipeError):
    """The input data cannot be used: missing files, columns, types, values."""


class OutputError(PcapipeError):
    """The output directory cannot be written as asked."""


class ClusterError(PcapipeError):
    """The compute cluster cannot be used as configured: unreachable, no workers, input unseen, too little memory."""


class InfrastructureError(PcapipeError):
    """The compute infrastructure failed during a run (scheduler lost, workers keep dying).

    Not the user's config: the checkpoint is kept and the same command with
    ``--resume`` continues once the cluster is back (exit status 3).
    """


class ResumeError(PcapipeError):
    """A checkpoint cannot be used to resume this run."""


class RunDirectoryError(PcapipeError):
    """A run directory is incomplete, edited, or of an unknown format version."""


class NotConvergedWarning(UserWarning):
    """Some requested components did not reach the tolerance."""
