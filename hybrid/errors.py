"""The one error type for bad input, shaped so the CLI can print one line."""
from __future__ import annotations


class InputError(ValueError):
    """Bad input: names the file, row, column, what was expected and found.

    Examples
    --------
    >>> str(InputError("expected a number, found 'five'", file="r.csv", row=3, column="score"))
    "r.csv: row 3: column 'score': expected a number, found 'five'"
    """

    def __init__(self, message: str, *, file: str | None = None,
                 row: int | None = None, column: str | None = None):
        self.message, self.file, self.row, self.column = message, file, row, column
        super().__init__(str(self))

    def __str__(self) -> str:
        parts = []
        if self.file:
            parts.append(str(self.file))
        if self.row is not None:
            parts.append(f"row {self.row}")
        if self.column is not None:
            parts.append(f"column '{self.column}'")
        parts.append(self.message)
        return ": ".join(parts)


def did_you_mean(name: str, options) -> str:
    """`` (did you mean 'x'?)`` for the closest of ``options``, or nothing.

    >>> did_you_mean("regoin", ["region", "process"])
    " (did you mean 'region'?)"
    """
    import difflib

    near = difflib.get_close_matches(str(name), [str(o) for o in options], n=1, cutoff=0.5)
    return f" (did you mean '{near[0]}'?)" if near else ""
