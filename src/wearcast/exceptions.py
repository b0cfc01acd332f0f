"""The library's own exceptions.

Each carries the process exit code the CLI uses (sysexits-style values) and a
message that says what is wrong and how to fix it. The library raises these;
only the CLI turns them into exit codes.
"""

from __future__ import annotations


class WearcastError(Exception):
    """Base class. ``exit_code`` is what the command line exits with."""

    exit_code = 1


class ConfigError(WearcastError):
    """The TOML configuration is wrong (unknown key, bad value, missing key)."""

    exit_code = 78


class InputMissingError(WearcastError):
    """A named input file does not exist or cannot be opened."""

    exit_code = 66


class DataError(WearcastError):
    """The export's contents cannot be used (too many bad rows, wrong columns)."""

    exit_code = 65

    def __init__(self, message: str, *, quarantine_path: str | None = None):
        super().__init__(message)
        self.quarantine_path = quarantine_path


class OutputError(WearcastError):
    """An output cannot be written (folder missing or not writable)."""

    exit_code = 73


class LockHeldError(WearcastError):
    """Another run holds the run lock."""

    exit_code = 75


class BundleError(WearcastError):
    """A saved model bundle is incomplete, tampered with, or does not reproduce."""

    exit_code = 65


class ModelError(WearcastError):
    """A model cannot be fitted on this data (for example: no failures)."""

    exit_code = 65


class CoxConvergenceError(ModelError):
    """lifelines' Cox fit did not converge even with a smaller step; its coefficients are not kept."""


class ChallengerRejected(WearcastError):
    """The monthly promotion gate kept the champion (outputs are still written)."""

    exit_code = 3
