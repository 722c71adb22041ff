"""Exception classes. Everything geosp raises on purpose derives from GeospError."""


import re

_LONG_NUMBER = re.compile(r"\d{40,}")


def _shorten_numbers(text):
    """A number of 40 digits or more is shown by its first digits and its length."""
    return _LONG_NUMBER.sub(lambda m: f"{m.group()[:12]}…({len(m.group())} digits)", text)


def _rebuild(cls, args, state):
    error = cls.__new__(cls)
    Exception.__init__(error, *args)
    error.__dict__.update(state)
    return error


class GeospError(Exception):
    """
    Base class for every error geosp raises on purpose.

    Errors survive pickling (a worker process or a Dask worker sends them back
    whole): they are rebuilt from their message and attributes, not by calling
    ``__init__`` again with arguments it does not take.
    """

    def __reduce__(self):
        return _rebuild, (type(self), self.args, dict(self.__dict__))


class InputError(GeospError, ValueError):
    """
    Input that geosp cannot use as given (exit code 2 on the command line).

    The message says where (file, then row or feature), what is wrong and how
    to fix it, in that order.
    """

    def __init__(self, path, problem, fix="", *, where=None):
        self.path, self.where, self.problem, self.fix = path, where, problem, fix
        location = str(path) if where is None else f"{path}, {where}"
        text = f"{location}: {_shorten_numbers(str(problem))}"
        if fix:
            text = f"{text} {fix}"
        super().__init__(text)


class InputErrors(InputError):
    """Several input problems reported at once (capped, with "and N more")."""

    def __init__(self, problems, *, cap=8):
        self.problems = list(problems)
        shown = [str(p) for p in self.problems[:cap]]
        more = len(self.problems) - len(shown)
        text = "\n  ".join(shown)
        if more > 0:
            text += f"\n  ... and {more} more"
        if len(self.problems) > 1:
            text = f"{len(self.problems)} problems in the input:\n  " + text
        GeospError.__init__(self, text)
        first = self.problems[0]
        self.path = getattr(first, "path", None)
        self.where = getattr(first, "where", None)
        self.problem = text
        self.fix = ""


class OptionError(InputError):
    """A bad option in the project file or on the command line (exit code 2)."""


def format_rows(rows, *, cap=5):
    """Format a list of row descriptions as 'a, b, c and N more'."""
    rows = [str(r) for r in rows]
    shown = rows[:cap]
    text = ", ".join(shown)
    if len(rows) > cap:
        text += f" and {len(rows) - cap} more"
    return text
