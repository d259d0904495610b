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
from dataclasses import dataclass

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
JOBS = "-1 (every core) or a whole number >= 1"


def _text(words="text"):
    return (lambda v: isinstance(v, str)), words


def _penalty():
    # a penalty is 'auto' (chosen on held-out ratings) or a number > 0
    ok = _real(lambda v: v > 0, "")[0]
    return (lambda v: v == "auto" if isinstance(v, str) else ok(v)), "a number > 0 or 'auto'"


def _jobs():
    return (lambda v: isinstance(v, numbers.Integral) and not isinstance(v, bool) and (v >= 1 or v == -1)), JOBS


def _scale():
    ok = _real(lambda v: True, "")[0]
    return (lambda v: isinstance(v, list) and len(v) == 2 and all(map(ok, v)) and v[0] < v[1],
            "[low, high] with low < high")


def _levels():
    ok = _real(lambda v: 0 < v <= 1, "")[0]
    return (lambda v: isinstance(v, (list, tuple)) and len(v) <= 10 and all(map(ok, v)),
            "a list of at most 10 fractions in (0, 1]")


@dataclass(frozen=True)
class Setting:
    """One setting: its default, its rule (a test and the words for what it allows), its help.

    ``in_file`` is False for settings that only a call or a flag gives (a budget, say).
    """

    default: object
    rule: tuple
    help: str
    in_file: bool = True

    @property
    def allowed(self) -> str:
        return self.rule[1]

    def ok(self, value) -> bool:
        return bool(self.rule[0](value))


S = Setting
# Every setting, by the section of the settings file it lives in.  The estimator's defaults,
# the settings file's defaults (configs/default.toml is rendered from this), the checks of the
# library, the TOML and the flags, and the flags' help all read this table.
SETTINGS = {
    "ratings": {
        "user": S("user", _text(), "column of user ids (read as text)"),
        "item": S("item", _text(), "column of item ids (read as text)"),
        "rating": S("rating", _text(), "column of ratings (numbers)"),
        "timestamp": S("", _text(), 'optional column of rating times; "" for none'),
        "scale": S([1.0, 5.0], _scale(), "lowest and highest valid rating"),
        "duplicates": S("error", _one_of("error", "last"),
                        'a repeated (user, item): "error", or "last" to keep the last'),
        "delimiter": S(",", _text(), "CSV field separator"),
    },
    "attributes": {
        "id": S("item", _text(), "column of item ids in the attribute table"),
        "tag_separator": S("|", _text(), "separator of tags inside one cell"),
        "delimiter": S(",", _text(), "CSV field separator"),
    },
    "features": {
        "text_max_features": S(2000, _whole(1), "largest TF-IDF vocabulary per text column"),
        "text_min_df": S(2, _whole(1), "a word must appear in this many items"),
        "text_ngrams": S(1, _whole(1), "2 adds word pairs"),
    },
    "model": {
        "rank": S(16, _whole(1), "most dimensions of user and item vectors (the fitted rank is at most this)"),
        "rank_choice": S("fixed", _one_of("fixed", "held-out"),
                         '"fixed": exactly rank; "held-out" (opt-in): grow the rank while held-out ratings '
                         "say it helps"),
        "lam_user": S("auto", _penalty(), 'regularisation of user blocks; "auto" chooses it on held-out ratings'),
        "lam_item": S("auto", _penalty(), "regularisation of item blocks around their projection (start value if learned)"),
        "lam_map": S("auto", _penalty(), "regularisation of the attribute map; a number fixes a penalty"),
        "epochs": S(25, _whole(1), "most alternating epochs"),
        "tol": S(1e-5, _real(lambda v: v >= 0, "a number >= 0"),
                 "stop when the objective changes by less than this fraction"),
        "seed": S(0, _whole(0), "seed of the start values and the holdout draw"),
        "prior": S("learned", _one_of("learned", "fixed"),
                   'item prior covariance: "learned" (cross-fitted EM) or "fixed" (lam_item * I)'),
        "map_weighting": S("none", _one_of("none", "precision", "bias"),
                           '"precision": items weigh on the map by n / (n + weight_half) of their n ratings;\n'
                           '"bias": only the bias coordinate\'s prior, by 1 + n / weight_half (see README)'),
        "weight_half": S(20.0, _real(lambda v: v > 0, "a number > 0"),
                         '"precision": the count at which an item weighs half; "bias": the count adding one'),
        "launch_offset": S("learned", _one_of("learned", "none"),
                           '"learned": new items\' bias moves by how far projections fell short on the\n'
                           'ratings items then got (out of sample, rating-weighted); "none": no offset'),
        # the settings file's value, with which every published MovieLens figure was measured
        "holdout": S(0.05, _real(lambda v: 0 <= v < 1, "a fraction in [0, 1)"),
                     "fraction of ratings kept aside to report validation RMSE"),
        "biases": S(True, ((lambda v: isinstance(v, bool)), "true or false"), "fit user and item biases"),
        "n_jobs": S(-1, _jobs(), "threads for the block solves; -1: every core"),
    },
    "score": {
        "liked": S(4.0, _real(lambda v: True, "a number"),
                   'a user "likes" an item when the expected rating is at least this'),
        "audience": S(10, _whole(0), "users listed per new item"),
        "neighbours": S(5, _whole(0), "neighbours (the closest rated items) listed per new item"),
        "chunk": S(2000, _whole(1), "items scored at a time (bounds memory)"),
        "clip_numbers": S(True, ((lambda v: isinstance(v, bool)), "true or false"),
                          "hold new items' numbers to the range seen in training before projecting"),
        "audience_by": S("taste", _one_of("taste", "rating"),
                         'rank the audience by "taste" (how much more a user is expected to like the item\n'
                         'than the average rated item) or by "rating" (expected rating)'),
        "interval": S(0.8, _real(lambda v: 0 < v < 1, "a fraction in (0, 1)"),
                      "the level of each item's interval of its expected rating"),
        "reasons": S(3, _whole(0), "attribute effects listed per item in CSV and Parquet (JSON lists all)"),
    },
    "plan": {
        "target": S(0.8, _real(lambda v: 0 < v <= 1, "a fraction in (0, 1]"),
                    "expected neighbour-list overlap an item must reach"),
        "k": S(10, _whole(1), "length of the neighbour list"),
        "draws": S(64, _whole(2), "posterior draws per item"),
        "max_needed": S(200, _whole(1), '"more than" this many ratings is reported as such'),
        "responders": S("active", _one_of(*RESPONDERS),
                        'whose answers "ratings needed" assumes: "active" users, or "likely" likers'),
        "responder_threshold": S(0.0, _real(lambda v: True, "a number"),
                                 'with "likely": expected rating above this (0 = the liked level)'),
        "candidate_min_ratings": S(20, _whole(0), "items with this many ratings are the candidates of neighbour lists"),
        "aim": S("reach", _one_of(*AIMS),
                 'budget split: "reach" (most items to target) or "gain" (most total stability)'),
        "seed": S(0, _whole(0), "seed of the posterior draws"),
        "budget": S(None, _whole(0), "ratings to collect in all", in_file=False),
        "per_user": S(None, _whole(1), "most asks per user", in_file=False),
        "per_item": S(None, _whole(1), "most ratings planned per item", in_file=False),
        "levels": S([0.5, 0.6, 0.7], _levels(), "stability levels whose ratings needed the plan file gives besides the\n"
                    "target's (an item is never just \"more than max_needed\")"),
    },
    "campaign": {
        "first_response": S(0.3, _real(lambda v: 0 < v <= 1, "a fraction in (0, 1]"),
                            "share of asks expected to be answered before a campaign's first answers are in"),
        "per_user": S(3, _whole(1), "most asks per user over the whole campaign (all waves)"),
        "cooling_off": S(2, _whole(0), "waves during which a user asked for an item who did not answer\n"
                         "is not asked for it again"),
    },
    "display": {
        "item": S("item", ((lambda v: isinstance(v, str) and v.strip() != ""), "a word"),
                  'what screens and the report call an item (e.g. "lot", "product"); files keep "item"'),
        "user": S("user", ((lambda v: isinstance(v, str) and v.strip() != ""), "a word"),
                  'what screens and the report call a user (e.g. "member", "customer"); files keep "user"'),
    },
    "engine": {
        "kind": S("local", _one_of("local", "dask"),
                  'where training, planning and scoring run: "local" (this process) or "dask"'),
        "address": S("", _text("a scheduler address such as 'tcp://10.0.0.5:8786', or '' to start a local cluster"),
                     'with "dask": the scheduler, e.g. "tcp://10.0.0.5:8786"; "" starts a local cluster'),
        "partitions": S(8, _whole(1), 'with "dask": blocks per side of the rating matrix'),
        "workers": S(2, _whole(1), 'with "dask" and no address: worker processes of the local cluster'),
        "shared_dir": S("", _text("a folder path, or ''"),
                        'with "dask": a folder every worker can read (partitioned ratings go there\n'
                        'during a fit); "" is the temporary folder, right for a cluster on this machine'),
    },
}
del S

# settings renamed so that one idea has one word (README, "Words used here"): the old name still
# works for one release, with a one-line notice where a user wrote it
RENAMED = {("plan", "pool_min_ratings"): "candidate_min_ratings"}


def upgrade_settings(cfg: dict | None, notice=None) -> dict | None:
    """``cfg`` with every renamed setting under its new name (in place); ``notice(old, new)`` is
    told of each one found, so that a settings file the user wrote can say so.

    >>> upgrade_settings({"plan": {"pool_min_ratings": 5}})
    {'plan': {'candidate_min_ratings': 5}}
    """
    for (section, old), new in RENAMED.items():
        table = (cfg or {}).get(section)
        if isinstance(table, dict) and old in table:
            table[new] = table.pop(old)
            if notice is not None:
                notice(f"{section}.{old}", f"{section}.{new}")
    return cfg


# the rules by themselves, for the checks below
PLAN = {name: s.rule for name, s in SETTINGS["plan"].items()}
SCORE = {name: s.rule for name, s in SETTINGS["score"].items()}
CAMPAIGN = {name: s.rule for name, s in SETTINGS["campaign"].items()}
# the estimator's settings: the model's, the text encoding's and the tag separator
ESTIMATOR = {**SETTINGS["model"], **SETTINGS["features"], "tag_separator": SETTINGS["attributes"]["tag_separator"]}


def defaults(section: str) -> dict:
    """The defaults of one section of the settings file."""
    return {name: s.default for name, s in SETTINGS[section].items() if s.in_file}


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
    if _jobs()[0](n_jobs):
        return usable_cores() if n_jobs == -1 else int(n_jobs)
    raise InputError(f"n_jobs must be {JOBS}, found {n_jobs!r}")


def _check(rules, values) -> None:
    for name, value in values.items():
        ok, expected = rules[name]
        if value is not None and not ok(value):
            raise InputError(f"{name} must be {expected}, found {value!r}")


def check_estimator(values: dict) -> None:
    """The estimator's settings (:class:`hybrid.HybridFactorModel`), each against its rule."""
    _check({name: s.rule for name, s in ESTIMATOR.items()}, {k: v for k, v in values.items() if k in ESTIMATOR})
    if values.get("map_weighting") == "bias" and not values.get("biases", True):
        raise InputError("map_weighting 'bias' needs biases = true")


def check_plan(**values) -> None:
    """Raise :class:`InputError` for the first value outside its rule (``None`` means unset)."""
    _check(PLAN, values)


def check_checks(**values) -> None:
    """The same for :func:`hybrid.evaluation.evaluate.evaluate`, :func:`hybrid.planning.calibration.calibrate` and
    :func:`hybrid.evaluation.tune.tune`."""
    _check(CHECKS, values)


def check_campaign(**values) -> None:
    """The same for a campaign's settings (``[campaign]``)."""
    _check(CAMPAIGN, values)


def check_score(**values) -> None:
    """The same for the scoring settings (``[score]``)."""
    _check(SCORE, values)
