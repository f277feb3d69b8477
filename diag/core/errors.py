"""The one exception type the core raises for bad input, with its location."""

from __future__ import annotations


class DiagError(Exception):
    """Bad input that a user can fix: a case, a readings file, a rules file.

    `file`, `line`, `where` (part, node, point or row) and `hint` (what to do) are
    optional; `str()` joins them as ``file:line: where: message (hint)``.
    """

    def __init__(self, message: str, *, file: str | None = None, line: int | None = None,
                 where: str | None = None, hint: str | None = None):
        self.message = message
        self.file = file
        self.line = line
        self.where = where
        self.hint = hint
        super().__init__(str(self))

    def __str__(self) -> str:
        loc = ""
        if self.file:
            loc = self.file + (f":{self.line}" if self.line else "") + ": "
        elif self.line:
            loc = f"line {self.line}: "
        who = f"{self.where}: " if self.where else ""
        tail = f" ({self.hint})" if self.hint else ""
        return f"{loc}{who}{self.message}{tail}"

    def __reduce__(self):
        # whole, fields and all, across a process boundary (diag.core.workers)
        return _restore, (type(self), dict(self.__dict__))


def _restore(cls: type, state: dict) -> DiagError:
    err = cls.__new__(cls)
    err.__dict__.update(state)
    Exception.__init__(err, str(err))
    return err


class CaseErrors(DiagError):
    """Several problems found in one file; `errors` holds each as a DiagError."""

    def __init__(self, errors: list[DiagError]):
        self.errors = list(errors)
        first = self.errors[0]
        super().__init__(first.message, file=first.file, line=first.line,
                         where=first.where, hint=first.hint)

    def __str__(self) -> str:
        return "\n".join(DiagError.__str__(e) for e in self.errors)
