"""The allowed range of each planner and scoring setting, in one place.

The library (:func:`hybrid.planning.planner.plan`), the TOML settings (``[plan]``,
:func:`hybrid.app.config.validate`) and the command line (whose flags reach the
library unchanged) all check a value against the same rule, so a bad number
gets the same one-line message wherever it comes from, and never reaches a
compiled kernel: a neighbour list of length 0 once made one write outside
its arrays.

>>> check_plan(k=10, budget=0)
>>> check_plan(k=0)
Traceback (most recent call last):
...
hybrid.common.errors.InputError: k must be a whole number >= 1, found 0
"""
from __future__ import annotations

import math
import numbers
import os

from hybrid.common.errors import InputError


def _whole(low):
    def ok(v):
        return isinstance(v, numbers.Integral) and not isinstance(v, bool) and v >= low
    return ok, f"a whole number >= {low}"


def _real(test, words):
    def ok(v):
        return isinstance(v, numbers.Real) and not isinstance(v, bool) and math.isfinite(v) and test(v)
    return ok, words


def _one_of(*options):
    return (lambda v: v in options), "one of " + ", ".join(repr(o) for o in options)


AIMS = ("reach", "gain")
RESPONDERS = ("active", "likely")

PLAN = {
    "target": _real(lambda v: 0 < v <= 1, "a fraction in (0, 1]"),
    "k": _whole(1),
    "draws": _whole(2),
    "max_needed": _whole(1),
    "budget": _whole(0),
    "per_user": _whole(1),
    "per_item": _whole(1),
    "pool_min_ratings": _whole(0),
    "seed": _whole(0),
    "aim": _one_of(*AIMS),
    "responders": _one_of(*RESPONDERS),
    "responder_threshold": _real(lambda v: True, "a number"),
}


SCORE = {
    "liked": _real(lambda v: True, "a number"),
    "audience": _whole(0),
    "neighbours": _whole(0),
    "chunk": _whole(1),
}


# the checks of a model on held-out ratings (evaluate, calibrate, tune)
CHECKS = {
    "folds": (lambda v: _whole(2)[0](v) and v <= 100, "a whole number from 2 to 100"),
    "min_ratings": _whole(1),
    "n_probe": _whole(1),
    "trials": _whole(1),
    "seed": _whole(0),
}


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the system tells it)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


JOBS = "-1 (every core) or a whole number >= 1"


def threads(n_jobs) -> int:
    """The number of threads ``n_jobs`` asks for: ``-1`` (the default) is every usable core.

    >>> threads(3)
    3
    >>> threads(-1) == usable_cores()
    True
    >>> threads(0)
    Traceback (most recent call last):
    ...
    hybrid.common.errors.InputError: n_jobs must be -1 (every core) or a whole number >= 1, found 0
    """
    if isinstance(n_jobs, numbers.Integral) and not isinstance(n_jobs, bool) and (n_jobs >= 1 or n_jobs == -1):
        return usable_cores() if n_jobs == -1 else int(n_jobs)
    raise InputError(f"n_jobs must be {JOBS}, found {n_jobs!r}")


def _check(rules, values) -> None:
    for name, value in values.items():
        ok, expected = rules[name]
        if value is not None and not ok(value):
            raise InputError(f"{name} must be {expected}, found {value!r}")


def check_plan(**values) -> None:
    """Raise :class:`InputError` for the first value outside its rule (``None`` means unset)."""
    _check(PLAN, values)


def check_checks(**values) -> None:
    """The same for :func:`hybrid.evaluation.evaluate.evaluate`, :func:`hybrid.planning.calibration.calibrate` and
    :func:`hybrid.evaluation.tune.tune`."""
    _check(CHECKS, values)


def check_score(**values) -> None:
    """The same for the scoring settings (``[score]``)."""
    _check(SCORE, values)
