"""The project's small error hierarchy.

Every error raised on purpose by mpo_fronts derives from :class:`FrontsError`; the concrete errors also derive
from the builtin a caller would naturally catch (``ValueError``, ``FileExistsError``). All of them pickle, so
they survive the trip back from a worker process. The command line turns any :class:`UserError` into a
one-paragraph message and exit code 2, without a traceback.
"""

from __future__ import annotations


class FrontsError(Exception):
    """Base class of all errors raised on purpose by mpo_fronts."""


class UserError(FrontsError):
    """Something the user asked for is wrong; the message says what and how to fix it."""


class InputError(UserError, ValueError):
    """An invalid argument to a library function (names the argument).

    ``arg`` is the name of the offending argument when there is one (for example ``"overwrite"``); the message
    speaks of the argument, and a front end such as the command line may add its own spelling of it (the CLI
    maps ``arg`` to its flag). Pickles with ``arg``.
    """

    def __init__(self, message: str, arg: str | None = None):
        super().__init__(message)
        self.arg = arg

    def __reduce__(self):
        return (type(self), (str(self), self.arg))


class ConfigError(UserError, ValueError):
    """An invalid run description; ``key`` is the dotted key path (for example ``engine.chi``)."""

    def __init__(self, key: str, message: str):
        super().__init__(key, message)
        self.key = key
        self.message = message

    def __str__(self) -> str:
        return f"{self.key}: {self.message}" if self.key else self.message


class RunDirectoryError(UserError, FileExistsError):
    """A run directory cannot be used as asked (another description, a foreign directory, ...).

    ``arg`` names the argument to change when there is one (``"out"``, ``"overwrite"``), as for
    :class:`InputError`. Pickles with ``arg``.
    """

    def __init__(self, message: str, arg: str | None = None):
        super().__init__(message)
        self.arg = arg

    def __reduce__(self):
        return (type(self), (str(self), self.arg))


class MissingDependencyError(UserError, ImportError):
    """An optional dependency is not installed; the message names the install command."""


class TruncationWarning(UserWarning):
    """Truncation removed so much of W(t) that values behind the front are no longer meaningful."""


#: Discarded weight above which every output warns (10 % of the operator's Frobenius weight lost).
LARGE_DISCARDED_WEIGHT = 0.1


def require(module: str, extra: str):
    """Import an optional dependency or raise :class:`MissingDependencyError` naming the install command."""
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise MissingDependencyError(
            f"the optional dependency '{module}' is not installed; install it with "
            f"\"pip install 'mpo-fronts[{extra}]'\" (or 'pip install {module.split('.')[0]}')"
        ) from exc
