"""Typed exceptions raised by rankfold.

Every error a user can cause derives from :class:`RankfoldError`.  The command
line turns each class into a message and an exit code in one place
(:mod:`rankfold.cli`); library code never prints and never exits.

Exit codes
----------
2  usage: an argument or option is malformed or out of range
3  input: the data source is missing, unreadable or holds values we refuse
4  resources: the memory ceiling (or disk) is too small for the job
5  output: the result path exists or cannot be written
6  checkpoint: a checkpoint beside the result belongs to another run (changed
   source or parameters) or is in use or unreadable
7  cluster: the scheduler cannot be reached, workers cannot read the data, or their
   versions differ from this process's
130 interrupted: stopped by SIGINT or SIGTERM after saving a checkpoint
"""

from __future__ import annotations


class RankfoldError(Exception):
    """Base class of every error a user can cause."""

    exit_code = 1


class UsageError(RankfoldError, ValueError):
    """An argument is malformed or out of its allowed range."""

    exit_code = 2


class SourceError(RankfoldError):
    """The data source cannot be opened or read as a numeric table."""

    exit_code = 3


class DataError(SourceError):
    """The data holds values the chosen policy refuses (missing, infinite, constant)."""

    exit_code = 3


class MemoryLimitError(RankfoldError):
    """The memory ceiling is too small for the state plus one block."""

    exit_code = 4


class OutputError(RankfoldError):
    """The result path exists, cannot be written, or is not a rankfold result."""

    exit_code = 5


class CheckpointError(RankfoldError):
    """A checkpoint beside the result cannot be used for this run.

    Raised when the source or the parameters changed since the checkpoint was
    written (the message lists what changed), when another run holds it, or
    when it is unreadable.  ``--restart`` (``restart=True``) discards it.
    """

    exit_code = 6


class Interrupted(RankfoldError):
    """The run stopped on SIGINT or SIGTERM; the message says how to resume."""

    exit_code = 130


class ClusterError(RankfoldError):
    """The dask cluster cannot run the job: unreachable, mismatched, or blind to the data."""

    exit_code = 7
