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


def did_you_mean_id(value: str, known) -> str:
    """`` (did you mean 'x'?)`` for an id that differs from a known one in case or spaces,
    else for a close spelling (among up to 20,000 ids, so the error path stays quick).

    >>> did_you_mean_id(" l0042", ["L0041", "L0042"])
    " (did you mean 'L0042'?)"
    """
    value = str(value)
    folded = "".join(value.split()).casefold()
    for k in known:
        if "".join(str(k).split()).casefold() == folded:
            return f" (did you mean '{k}'?)"
    known = list(known)
    return did_you_mean(value, known) if len(known) <= 20_000 else ""
