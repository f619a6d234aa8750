"""Errors a user can fix. The CLI prints them as one line and exits with code 2."""

from __future__ import annotations


class TriageError(Exception):
    """A problem with the user's input, model or options (exit code 2, no traceback)."""

    exit_code = 2

    def __init__(self, message: str, *, path: str | None = None, line: int | None = None, hint: str = ""):
        self.message = message
        self.path = str(path) if path is not None else None
        self.line = line
        self.hint = hint
        super().__init__(self.one_line())

    def one_line(self) -> str:
        where = ""
        if self.path:
            where = self.path + (f":{self.line}" if self.line is not None else "") + ": "
        text = f"{where}{self.message}"
        if self.hint:
            text += f" ({self.hint})"
        return " ".join(text.split())


class InputError(TriageError):
    """The dev set cannot be read as given."""


class ModelError(TriageError):
    """The model directory cannot be loaded as given."""


class ClusterError(TriageError):
    """The Ray cluster cannot be reached, or a worker cannot load the model or went missing."""


class OptionError(TriageError):
    """An option value is wrong or two options contradict each other."""


class OptionValueError(OptionError):
    """An option value out of range, named by its Python name (the CLI names its flag instead)."""

    def __init__(self, option: str, detail: str):
        self.option, self.detail = option, detail
        super().__init__(f"{option} {detail}")


def check_at_least_one(option: str, value: int | None) -> None:
    """The one check of a count option (rows per step, rows per page, sampled rows, beam width)."""
    if value is not None and value < 1:
        raise OptionValueError(option, f"must be at least 1, got {value}")
