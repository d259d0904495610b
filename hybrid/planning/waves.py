"""A sampling campaign run in waves: plan, contact, import the answers, fold them in, repeat.

Everything a campaign does is written to its ledger (:mod:`hybrid.io.ledger`), so each wave
knows the waves before it: opted-out users are never asked, ``per_user`` counts asks over all
waves, a user asked for an item who did not answer is not asked for it again during the
cooling-off, and each user's chance of answering is estimated from the answers seen
(:mod:`hybrid.planning.responses`).  Asks are sized so that the expected answers meet the
ratings planned.  At each import the wave's numbers are checked against what came: the share of
each item's list that stands after its answers are folded in, predicted
(:func:`~hybrid.planning.kept.expected_kept`) and seen.

Ratings are personal data and a campaign contacts people: ask only people who agreed to be
asked, honour every opt-out, and follow the data-protection law that applies to you.  Every
number here is an estimate.
"""
from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd

from hybrid.common.errors import InputError, did_you_mean_id
from hybrid.common.limits import check_campaign, check_plan, defaults
from hybrid.core.posterior import overlap_of_lists
from hybrid.estimator.updates import held_already
from hybrid.io.ledger import Ledger
from hybrid.planning.assess import Assessor
from hybrid.planning.kept import current_lists
from hybrid.planning.planner import Plan, plan, priority_weights
from hybrid.planning.responses import Contacts, contacts_from_history

_C = defaults("campaign")
_PLAN_KEYS = ("target", "k", "draws", "seed", "max_needed", "aim", "responders", "responder_threshold",
              "candidate_min_ratings", "levels", "priority", "per_item")


class Campaign:
    """One campaign and its ledger (:meth:`start` a new one, or :meth:`open` one).

    Examples
    --------
    >>> import tempfile, os
    >>> from hybrid import HybridFactorModel
    >>> from hybrid.datasets.club import tasting_club
    >>> club = tasting_club(n_members=300, n_lots=40, n_new=0, seed=3)
    >>> m = HybridFactorModel(rank=3, epochs=8, schema=club.schema).fit(club.ratings, club.lots)
    >>> c = Campaign.start(os.path.join(tempfile.mkdtemp(), "c.ledger"), m, budget=60,
    ...                    plan_settings={"k": 5, "draws": 16})
    >>> wave, p = c.plan_wave(m)
    >>> wave, bool(p.summary()["asks"] > p.summary()["ratings planned"])   # not everyone answers
    (1, True)
    """

    def __init__(self, ledger: Ledger):
        self.ledger = ledger

    @classmethod
    def start(cls, path, model, *, budget=None, per_user=_C["per_user"], cooling_off=_C["cooling_off"],
              first_response=_C["first_response"], plan_settings: dict | None = None,
              about: dict | None = None) -> "Campaign":
        """Start a campaign on ``model``: its settings are fixed in a new ledger at ``path``.

        ``budget`` is the ratings the whole campaign may collect (``None``: no limit; each wave
        then needs its own); ``plan_settings`` are :func:`hybrid.plan`'s (target, k, ...);
        ``about`` is kept as given (the command line keeps the settings file's column names and
        nouns there).
        """
        plan_settings = dict(plan_settings or {})
        unknown = sorted(set(plan_settings) - set(_PLAN_KEYS))
        if unknown:
            raise InputError(f"'{unknown[0]}' is not a plan setting a campaign keeps ({', '.join(_PLAN_KEYS)})")
        check_campaign(per_user=per_user, cooling_off=cooling_off, first_response=first_response)
        check_plan(budget=budget, **{k: v for k, v in plan_settings.items() if k not in ("priority", "levels")})
        model.check_fitted()
        priority_weights(model, plan_settings.get("priority"))   # a column the model does not have: say so now
        settings = {"budget": budget, "per_user": per_user, "cooling_off": cooling_off,
                    "first_response": first_response, "plan": plan_settings, "about": about}
        return cls(Ledger.create(path, settings, model.fingerprint_))

    @classmethod
    def open(cls, path) -> "Campaign":
        return cls(Ledger.open(path))

    def close(self) -> None:
        self.ledger.close()

    def __enter__(self) -> "Campaign":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @property
    def settings(self) -> dict:
        return self.ledger.settings

    # ------------------------------------------------------------ planning a wave
    def contacts(self, model, wave: int | None = None) -> Contacts:
        """Whom wave ``wave`` (by default the next) may ask, and each user's chance of answering."""
        s, led = self.settings, self.ledger
        wave = led.last_wave() + 1 if wave is None else wave
        answers = led.answers()
        return contacts_from_history(model, led.asks(), answers, led.opted_out(), wave=wave,
                                     per_user=s["per_user"], cooling_off=s["cooling_off"],
                                     first_response=s["first_response"],
                                     answered_waves=answers["wave"].unique().tolist())

    def budget_left(self) -> int | None:
        """Ratings the campaign may still collect (its budget less the answers folded in)."""
        budget = self.settings["budget"]
        return None if budget is None else max(int(budget) - len(self.ledger.answers()), 0)

    def plan_wave(self, model, budget=None, client=None) -> tuple[int, Plan]:
        """Plan the next wave on ``model`` and record it.  ``budget`` (ratings this wave) defaults
        to what the campaign has left.  Returns the wave's number and its plan."""
        left = self.budget_left()
        if budget is not None and not (isinstance(budget, (int, np.integer)) and budget >= 1):
            raise InputError(f"the wave's budget must be a whole number >= 1, found {budget!r}")
        if budget is None:
            if left is None:
                raise InputError("this campaign has no overall budget: give the wave's budget (ratings to collect)")
            budget = left
        elif left is not None and budget > left:
            raise InputError(f"the wave's budget ({budget}) is more than the campaign has left ({left})")
        if budget == 0:
            raise InputError("the campaign's budget is spent: nothing left to plan")
        contacts = self.contacts(model)
        p = plan(model, **self.settings["plan"], budget=budget, contacts=contacts, client=client)
        bought = p.items[p.items["planned"] > 0]
        items = bought.rename(columns={"stability": "stability_before", "stability_after": "stability_expected",
                                       "expected_kept": "kept_expected"})
        summary = {**p.summary(), "opted out": int(contacts.opted_out.sum()), "budget": int(budget),
                   "expected gain": float((bought["stability_after"] - bought["stability"]).sum())}
        asks = p.asks[["user", "item", "order", "answer_chance", "expected_rating"]].itertuples(index=False, name=None)
        wave = self.ledger.add_wave(model.fingerprint_, {**p.settings, "budget": int(budget)}, asks, summary, items)
        return wave, p

    # ------------------------------------------------------------ answers
    def import_answers(self, model, answers: pd.DataFrame, source: str, wave: int | None = None,
                       attributes: pd.DataFrame | None = None, save=None):
        """Fold a wave's answers (columns user, item, rating; already read and checked against the
        scale) into ``model`` through ``update``, and record them.

        Answers nobody was asked for are kept and counted (``unasked``); unknown users or items
        and a file imported before are refused with one line, and nothing changes.  ``model`` is
        changed in place and returned with a summary of the import.  ``save(model)``, if given,
        runs before the ledger records the import: a failure between the two leaves a model
        the ledger does not count, and importing again is safe.
        """
        led = self.ledger
        wave = led.last_wave() if wave is None else wave
        if wave < 1:
            raise InputError("no wave has been planned in this campaign yet: plan one first")
        if not len(answers):
            raise InputError("no answers to import (the table is empty)")
        digest = answers_digest(answers)
        before_wave = led.has_import(digest)
        if before_wave is not None:
            raise InputError(f"these answers were imported before (wave {before_wave}); nothing changed")
        _check_known(model, answers, attributes)
        # a rating the model already holds with the same value is not an answer to this wave: a
        # cumulative export repeats the answers imported before, a wrong file (the training
        # ratings) is nothing but such rows
        same = held_already(model, answers)[1]
        if same.all():
            raise InputError(f"all {len(answers)} answers are ratings the model already holds with the same values "
                             "(imported before, or the training ratings?); nothing changed")
        skipped = int(same.sum())
        answers = answers[~same]
        _check_asked(led, wave, answers)
        items = led.wave_items(wave)
        outcome, fp = _fold_and_compare(model, answers, items, self.settings["plan"], attributes)
        if save is not None:
            save(model)
        rows = zip(range(1, len(answers) + 1), answers["user"], answers["item"], answers["rating"])
        led.record_import(wave, digest, source, rows, fp, outcome)
        got = led.answers()
        mine = got[(got["wave"] == wave) & (got["source"] == source)]
        return model, {"wave": wave, "answers": len(answers), "already in the model (skipped)": skipped,
                       "unasked": int(mine["asked_wave"].isna().sum()),
                       "asks in the wave": len(led.asks(wave)), "model fingerprint": fp}

    # ------------------------------------------------------------ what the campaign did
    def progress(self) -> pd.DataFrame:
        """One row per wave: asked, answered, response rate, expected answers, ratings folded in,
        items newly trusted, budget left after it, expected against realised gain, and the share of
        the lists predicted to stand against the share seen."""
        led = self.ledger
        waves, asks, answers, items = led.waves(), led.asks(), led.answers(), led.wave_items()
        target = self.settings["plan"].get("target", defaults("plan")["target"])
        rows, spent, budget = [], 0, self.settings["budget"]
        for w in waves.itertuples():
            a = asks[asks["wave"] == w.wave]
            got = answers[answers["wave"] == w.wave]
            answered = int(got["asked_wave"].notna().sum())
            spent += len(got)
            it = items[items["wave"] == w.wave]
            came = it[it["answers"].notna()]
            rows.append({
                "wave": int(w.wave), "asked": len(a), "expected_answers": round(float(a["propensity"].sum()), 1),
                "answered": answered, "response_rate": answered / len(a) if len(a) and len(got) else np.nan,
                "ratings_folded_in": len(got), "unasked_answers": int(got["asked_wave"].isna().sum()),
                "items_planned": len(it),
                "items_newly_trusted": int(((came["stability_before"] < target) & (came["stability_after"] >= target)).sum()),
                "expected_gain": float((it["stability_expected"] - it["stability_before"]).sum()),
                "realised_gain": float((came["stability_after"] - came["stability_before"]).sum()) if len(came) else np.nan,
                "kept_predicted": float(came["kept_predicted"].mean()) if len(came) else np.nan,
                "kept_seen": float(came["kept_seen"].mean()) if len(came) else np.nan,
                "budget_left": None if budget is None else max(int(budget) - spent, 0),
                "answers_in": bool(len(got))})
        return pd.DataFrame(rows)

    def contact_sheet(self, wave: int | None = None) -> pd.DataFrame:
        """A wave's asks ready for a mail-merge or a CRM import: one row per user, the items to ask
        them about in the planner's order, most important first.  Users who opted out since the
        wave was planned are left out."""
        led = self.ledger
        wave = led.last_wave() if wave is None else wave
        asks = led.asks(wave)
        asks = asks[~asks["user"].isin(led.opted_out())]
        grouped = asks.sort_values(["user", "ord", "item"]).groupby("user", sort=True)
        return pd.DataFrame({"user": list(grouped.groups), "wave": wave,
                             "items": grouped["item"].agg("|".join).to_numpy(),
                             "n_items": grouped.size().to_numpy(),
                             "answer_chance": grouped["propensity"].first().round(3).to_numpy()})

    def opt_out(self, users, source: str = "request") -> int:
        """Put users on the do-not-contact list; every later wave and contact sheet leaves them out."""
        return self.ledger.opt_out([str(u) for u in users], source)

    def erase(self, user: str, model=None):
        """Remove a person: every ledger row naming them and, given ``model``, their ratings and
        vector (:func:`hybrid.estimator.updates.fold_out`).  Returns the counts removed."""
        counts = self.ledger.erase(str(user))
        if model is not None:
            from hybrid.estimator.updates import fold_out
            fold_out(model, [str(user)])
        return counts


def answers_digest(answers: pd.DataFrame) -> str:
    """A digest of a set of answers that ignores row order and number formatting, so that the
    same answers sent twice (re-exported, say) are known as such."""
    table = answers[["user", "item", "rating"]].astype({"user": str, "item": str, "rating": float})
    text = table.sort_values(["user", "item", "rating"]).to_csv(index=False, float_format="%.6g")
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def _check_asked(led, wave, answers):
    """Refuse a file most of whose rows nobody asked for: more unasked answers than the wave had
    asks is not a wave's answers (other ratings go in with ``update``)."""
    asked = led.asks()
    asked = set(zip(asked.loc[asked["wave"] <= wave, "user"], asked.loc[asked["wave"] <= wave, "item"]))
    unasked = sum((str(u), str(i)) not in asked for u, i in zip(answers["user"], answers["item"]))
    asks = len(led.asks(wave))
    if unasked > asks:
        raise InputError(f"{unasked} of the {len(answers)} answers were never asked for, more than wave {wave}'s "
                         f"{asks} asks: not this campaign's answers? (fold other ratings in with `hybrid update`); "
                         "nothing changed")


def _check_known(model, answers, attributes):
    users = pd.Index(model.user_ids_)
    unknown = answers.loc[users.get_indexer(answers["user"].astype(str)) < 0, "user"]
    if len(unknown):
        first = str(unknown.iloc[0])
        raise InputError(f"user '{first}' is not in the model{did_you_mean_id(first, model.user_ids_)} "
                         f"({len(unknown)} answers from unknown users); nothing changed")
    known_items = set(model.item_ids_) | (set() if attributes is None else set(attributes.index.astype(str)))
    bad = answers.loc[~answers["item"].astype(str).isin(known_items), "item"]
    if len(bad):
        first = str(bad.iloc[0])
        raise InputError(f"item '{first}' is not in the model{did_you_mean_id(first, model.item_ids_)}; nothing changed")


def _fold_and_compare(model, answers, items: pd.DataFrame, plan_settings, attributes):
    """Fold ``answers`` in and say, for the wave's items, what was predicted and what came."""
    k = plan_settings.get("k", defaults("plan")["k"])
    names = items["item"].astype(str).to_numpy()
    where = pd.Index(model.item_ids_).get_indexer(names)
    per = answers["item"].astype(str).value_counts().reindex(names, fill_value=0).to_numpy()
    A = Assessor(model, k, plan_settings.get("draws", defaults("plan")["draws"]), plan_settings.get("seed", 0),
                 plan_settings.get("candidate_min_ratings", defaults("plan")["candidate_min_ratings"]))
    predicted = A.kept(where, per)[0] if len(where) else np.empty(0)
    before = current_lists(model, where, A.pool, k)
    model.fold_in(answers, attributes=attributes)
    seen = overlap_of_lists(before, current_lists(model, where, A.pool, k)) if len(where) else np.empty(0)
    after = Assessor(model, k, A.eps.shape[0], plan_settings.get("seed", 0), pool=A.pool).at(where, 0)[0] \
        if len(where) else np.empty(0)
    outcome = pd.DataFrame({"item": names, "answers": per, "kept_predicted": predicted, "kept_seen": seen,
                            "stability_after": after})
    return outcome, model.fingerprint_

