"""Errors a user can act on. Each names the spec key, table or column at fault and how to fix it."""

from __future__ import annotations


class SqlmatchError(Exception):
    """Base class: the CLI prints these as one line and exits non-zero, without a traceback."""

    exit_code = 2


class SpecError(SqlmatchError):
    """The study spec is wrong: names the key, what is wrong, and how to fix it."""

    def __init__(self, key: str, problem: str, fix: str | None = None):
        self.key = key
        self.problem = problem
        self.fix = fix
        text = f"spec key '{key}': {problem}"
        if fix:
            text += f" Fix: {fix}"
        super().__init__(text)


class DataError(SqlmatchError):
    """The data does not support the study as specified (empty cohort, no controls, ...)."""

    def __init__(self, key: str, problem: str, fix: str | None = None):
        self.key = key
        text = f"{problem} (spec key '{key}')"
        if fix:
            text += f" Fix: {fix}"
        super().__init__(text)


class EngineError(SqlmatchError):
    """The engine refused a statement or could not be reached."""
