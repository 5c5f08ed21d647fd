"""Errors a user can cause, each described in one line: a config, a run folder."""

from __future__ import annotations


def one_line(text: str) -> str:
    """``text`` with every run of whitespace (newlines too) as one space."""
    return " ".join(str(text).split())


class UserError(ValueError):
    """A problem a user can cause and mend (config, run folder, hedge table, CSV): the command line
    prints ``str(error)``, one line, and exits non-zero; anything else is a bug and raises."""


class ConfigError(UserError):
    """A config problem, described in one line.

    ``str(error)`` is the message, e.g. ``book.options[1].strike: must be > 0, got -5``.
    Attributes: ``source`` (file or label the config came from), ``key`` (TOML key
    path, or None for file-level problems) and ``problems`` (every problem found,
    one line each; the message reports the first).
    """

    def __init__(
        self,
        message: str,
        *,
        source: str = "<config>",
        key: str | None = None,
        problems: tuple[str, ...] = (),
    ) -> None:
        message = one_line(message)
        super().__init__(message)
        self.source = source
        self.key = key
        self.problems = problems or (message,)


class RunFolderError(UserError):
    """A run folder that cannot be read back (missing, unfinished or changed since written), in one line."""

    def __init__(self, message: str) -> None:
        super().__init__(one_line(message))


class PolicyError(UserError):
    """A policy that cannot be trusted with a decision (it named a NaN or infinite target), in one line."""
