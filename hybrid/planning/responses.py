"""Who will answer: each user's response propensity, and whom a wave may contact.

A campaign's asks are not all answered.  Each user's propensity to answer is estimated from
what the campaign has seen (answers over asks), shrunk toward a prior mean by a beta-binomial
empirical-Bayes prior (Casella, "An introduction to empirical Bayes data analysis", The
American Statistician 39, 1985): with ``y`` answers to ``n`` asks and a prior
``Beta(s m, s (1 - m))``, the estimate is ``(y + s m) / (n + s)``.  The prior's mean ``m`` is
the campaign's answer rate, scaled for each user by their rating activity relative to the users
asked (so a user never asked is estimated from activity alone); its strength ``s`` maximises the
beta-binomial likelihood of the answers seen (``scipy.stats.betabinom``).  Before any answers
the rate is the ``first_response`` setting.  Every number is an estimate.

:class:`Contacts` carries, for one wave, each user's propensity, the asks left under the
campaign-wide cap, the do-not-contact list and the pairs still cooling off.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.optimize import minimize_scalar
from scipy.stats import betabinom

from hybrid.common.limits import SETTINGS

FIRST_RESPONSE = SETTINGS["campaign"]["first_response"].default
_FLOOR, _CEIL = 0.01, 0.95    # no one is certain to answer, or certain not to


def activity_share(activity):
    """A relative propensity in (0, 1) from each user's number of ratings: ``n / (n + median)``.

    >>> activity_share([0, 10, 30]).round(3).tolist()
    [0.0, 0.5, 0.75]
    """
    activity = np.asarray(activity, float)
    med = max(float(np.median(activity)), 1.0)
    return activity / (activity + med)


def prior_means(activity, rate, asked=None):
    """Each user's prior mean: ``rate`` scaled by activity relative to the users asked (all
    users when none has been asked yet), held inside ``[0.01, 0.95]``."""
    share = activity_share(activity)
    base = share[asked] if asked is not None and np.any(asked) else share
    return np.clip(rate * share / max(float(base.mean()), 1e-9), _FLOOR, _CEIL)


def prior_strength(answered, asked, means) -> float:
    """The beta-binomial prior's strength ``s`` that best explains the answers seen
    (maximum marginal likelihood on a log scale from 0.5 to 1000)."""
    y, n, m = (np.asarray(a, float) for a in (answered, asked, means))
    if n.sum() == 0:
        return 10.0   # nothing seen: any value gives the prior mean
    def cost(log_s):
        s = np.exp(log_s)
        return -betabinom.logpmf(y, n, s * m, s * (1 - m)).sum()
    return float(np.exp(minimize_scalar(cost, bounds=(np.log(0.5), np.log(1000.0)), method="bounded").x))


def response_propensity(activity, asked, answered, first_response=FIRST_RESPONSE):
    """Each user's estimated chance of answering an ask (empirical Bayes, see the module).

    ``asked`` and ``answered`` count each user's asks in waves whose answers are in.

    >>> p = response_propensity([10, 10, 10, 10], [4, 4, 0, 0], [4, 0, 0, 0])
    >>> bool(p[0] > p[2] > p[1])      # the user who answered all, one never asked, one who never answered
    True
    """
    asked, answered = np.asarray(asked, float), np.asarray(answered, float)
    rate = answered.sum() / asked.sum() if asked.sum() else first_response
    m = prior_means(activity, rate, asked > 0)
    seen = asked > 0
    s = prior_strength(answered[seen], asked[seen], m[seen])
    return np.clip((answered + s * m) / (asked + s), _FLOOR, _CEIL)


@dataclass
class Contacts:
    """Whom one wave may ask, and how likely each is to answer (arrays over the model's users).

    ``blocked`` maps an item's index to the user indices that may not be asked for it this
    wave (asked earlier and unanswered, inside the cooling-off).
    """

    propensity: np.ndarray
    asks_left: np.ndarray
    opted_out: np.ndarray
    blocked: dict = field(default_factory=dict)

    @classmethod
    def fresh(cls, model, per_user=None, first_response=FIRST_RESPONSE) -> "Contacts":
        """Contacts for a campaign with no history: propensity from activity alone."""
        n = len(model.user_ids_)
        p = response_propensity(model.user_counts_, np.zeros(n), np.zeros(n), first_response)
        left = np.full(n, _cap(per_user), dtype=np.int64)
        return cls(p, left, np.zeros(n, bool))


def contacts_from_history(model, asks: pd.DataFrame, answers: pd.DataFrame, opted_out, *, wave: int,
                          per_user=None, cooling_off: int = 2, first_response=FIRST_RESPONSE,
                          answered_waves=()) -> Contacts:
    """Contacts for wave ``wave`` from a campaign's record.

    ``asks`` has columns wave, user, item; ``answers`` user, item, asked_wave; ``answered_waves``
    are the waves whose answers are in (their unanswered asks count against a user's
    propensity; asks of a wave still out do not).
    """
    users = pd.Index(model.user_ids_)
    n = len(users)
    u_ask = users.get_indexer(asks["user"].astype(str))
    known = u_ask >= 0   # a user erased from the model since has no row here
    closed = asks["wave"].isin(list(answered_waves)).to_numpy() & known
    asked = np.bincount(u_ask[closed], minlength=n)
    hit = answers.dropna(subset=["asked_wave"])
    u_ans = users.get_indexer(hit["user"].astype(str))
    answered = np.bincount(u_ans[u_ans >= 0], minlength=n)
    p = response_propensity(model.user_counts_, asked, answered, first_response)
    used = np.bincount(u_ask[known], minlength=n)
    left = np.maximum(_cap(per_user) - used, 0).astype(np.int64)
    out = np.zeros(n, bool)
    out[users.get_indexer([u for u in opted_out if u in users])] = True
    return Contacts(p, left, out, _cooling(model, asks, answers, wave, cooling_off))


def _cap(per_user) -> int:
    """Asks a user may get in all (no cap, or one too large to matter, is the largest count)."""
    top = np.iinfo(np.int64).max
    return top if per_user is None else int(min(int(per_user), top))


def _cooling(model, asks, answers, wave, cooling_off) -> dict:
    """Item index -> user indices asked within ``cooling_off`` waves before ``wave`` and not
    (yet) answered; with ``cooling_off = 0`` nothing is held back."""
    recent = asks[(asks["wave"] >= wave - cooling_off) & (asks["wave"] < wave)]
    if not len(recent) or cooling_off == 0:
        return {}
    done = set(zip(answers["user"].astype(str), answers["item"].astype(str)))
    left = recent[[(u, i) not in done for u, i in zip(recent["user"].astype(str), recent["item"].astype(str))]]
    u = pd.Index(model.user_ids_).get_indexer(left["user"].astype(str))
    i = pd.Index(model.item_ids_).get_indexer(left["item"].astype(str))
    ok = (u >= 0) & (i >= 0)
    frame = pd.DataFrame({"u": u[ok], "i": i[ok]})
    return {int(k): g["u"].to_numpy() for k, g in frame.groupby("i")}
