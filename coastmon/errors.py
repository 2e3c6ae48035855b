"""User-facing errors.

Every error a user can cause (a bad file, a missing variable, a settings typo, a record too
short) is raised as a :class:`CoastmonError` whose message is one clear paragraph: what was
wrong, where, and what to do about it. The command line prints that paragraph and exits with
status 2, without a traceback. Anything else that escapes is a bug in coastmon.
"""

from __future__ import annotations


class CoastmonError(Exception):
    """An error the user can fix; the message is one paragraph (what, where, what to do)."""

    exit_code = 2

    def __init__(self, what: str, where: str | None = None, todo: str | None = None) -> None:
        self.what = what.strip()
        self.where = where
        self.todo = todo
        parts = [self.what.rstrip(".") + "."]
        if where:
            parts.append(f"Where: {where}.")
        if todo:
            todo = todo.strip().rstrip(".")
            parts.append(todo if todo.endswith(("?", "!")) else todo + ".")
        super().__init__(" ".join(parts))

    def __reduce__(self):
        # Rebuilt from its parts when it crosses between processes (the pass's readers).
        return (type(self), (self.what, self.where, self.todo))


class InputError(CoastmonError):
    """An input file or store cannot be used as given."""


class SettingsError(CoastmonError):
    """A settings file or command-line option is invalid."""


class GeometryError(CoastmonError):
    """The land/sea mask yields no usable coastline (no land, no sea, coast too short)."""


class RecordError(CoastmonError):
    """The time record cannot support the requested analysis (too short, gaps, repeats)."""


class OutputError(CoastmonError):
    """The output location cannot be written safely."""


class DataWarning(UserWarning):
    """Data that look implausible but can still be analysed (e.g. speeds that look like
    cm/s); the pipeline lists these as notes in the summary and the report."""
