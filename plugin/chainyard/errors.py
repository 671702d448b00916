"""One error hierarchy for everything a user can get wrong.

Every error a user can cause derives from :class:`ChainyardError`. The command line prints
``str(error)`` (one line per problem, no traceback) and exits with ``error.exit_code``.
Anything else that escapes is a bug in chainyard and keeps its traceback.
"""

from __future__ import annotations

__all__ = [
    "ChainyardError",
    "ConfigError",
    "LimitExceededError",
    "ModelError",
    "StorageFaultError",
    "StoreConflictError",
    "StoreError",
    "StoreLockedError",
    "TargetsNotMetError",
    "UnsafeInputError",
    "VerificationError",
]


class ChainyardError(Exception):
    """Base class of all user-facing errors.

    Attributes
    ----------
    exit_code : int
        Process exit status the command line uses for this error.
    """

    exit_code: int = 1


class TargetsNotMetError(ChainyardError):
    """The run's convergence/precision targets are not met (``diagnose --strict``,
    ``sample --until-targets`` when its budget is spent)."""

    exit_code = 1


class ConfigError(ChainyardError):
    """The run configuration (or a file it names) is invalid.

    Parameters
    ----------
    problems : list of str
        One human-readable line per problem, each naming the field or file.
    """

    exit_code = 2

    def __init__(self, problems: list[str] | str) -> None:
        self.problems = [problems] if isinstance(problems, str) else list(problems)
        super().__init__("\n".join(self.problems))

    def located(self, source: str) -> ConfigError:
        """The same problems, each prefixed by ``source`` (the config file) if not already."""
        return ConfigError(
            [p if p.startswith(f"{source}: ") else f"{source}: {p}" for p in self.problems]
        )


class ModelError(ChainyardError):
    """The user's log-probability function misbehaved (raised, returned NaN or a bad shape)."""

    exit_code = 3


class StoreError(ChainyardError):
    """A store is missing, unreadable or not a chainyard store."""

    exit_code = 4


class StoreConflictError(StoreError):
    """An existing store was made with settings that differ from the requested run."""

    exit_code = 5


class StoreLockedError(StoreError):
    """Another process holds the store's write lock."""

    exit_code = 6


class VerificationError(ChainyardError):
    """A store, pack or record failed verification or replay (a byte, counter or hash differs).

    Also raised when a replay cannot start because the model or data no longer match their
    recorded hashes.
    """

    exit_code = 7


class UnsafeInputError(StoreError):
    """A store or pack from elsewhere is malformed or unsafe (a path escaping its folder, a
    symlink member, a member missing from the manifest); nothing was written."""

    exit_code = 4


class LimitExceededError(StoreError):
    """A store, pack or config declares or holds more than a documented limit allows
    (see :mod:`chainyard.limits`); the message names the limit and how to raise it."""

    exit_code = 4


class StorageFaultError(ChainyardError):
    """The file system refused a write or read (disk full, read-only, file-size limit, I/O
    error). The last commit is intact; the message names the path and the system error."""

    exit_code = 8
