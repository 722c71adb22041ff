"""Exception classes. Everything geosp raises on purpose derives from GeospError."""


class GeospError(Exception):
    """Base class for every error geosp raises on purpose."""


class InputError(GeospError, ValueError):
    """
    Input that geosp cannot use as given (exit code 2 on the command line).

    The message says where (file, then row or feature), what is wrong and how
    to fix it, in that order.
    """

    def __init__(self, path, problem, fix="", *, where=None):
        self.path, self.where, self.problem, self.fix = path, where, problem, fix
        location = str(path) if where is None else f"{path}, {where}"
        text = f"{location}: {problem}"
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
