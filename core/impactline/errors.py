"""Exceptions with the context a user needs to fix the problem (file, key, sample index, suggestion)."""

from __future__ import annotations

from pathlib import Path

__all__ = ["ImpactlineError", "InputError", "PipelineError", "PluginError"]


class ImpactlineError(Exception):
    """Base class of every error impactline raises on purpose."""


class InputError(ImpactlineError):
    """A recording (or its sidecar) cannot be read as given.

    Parameters
    ----------
    path : path-like
        The offending file.
    problem : str
        What is wrong, with the expected value next to the given one.
    fix : str, optional
        What the user can do about it.
    sample_index : int, optional
        Absolute sample index where the problem was found.
    key : str, optional
        Key (sidecar field, dataset path, column) concerned.
    """

    def __init__(self, path: str | Path, problem: str, fix: str = "", *, sample_index: int | None = None,
                 key: str | None = None):
        self.path = Path(path)
        self.problem = problem
        self.fix = fix
        self.sample_index = sample_index
        self.key = key
        where = str(self.path)
        if key is not None:
            where += f" [{key}]"
        if sample_index is not None:
            where += f" at sample {sample_index}"
        message = f"{where}: {problem}"
        if fix:
            message += f". Fix: {fix}"
        super().__init__(message)


class PipelineError(ImpactlineError):
    """A pipeline file is malformed or names stages/parameters that do not fit.

    ``problems`` holds every problem found, each already prefixed with the file and key.
    """

    def __init__(self, problems: list[str]):
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))


class PluginError(ImpactlineError):
    """A plugin does not fit the contract of its stage kind (reported when it registers)."""
