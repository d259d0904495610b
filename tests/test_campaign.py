"""A campaign over several waves: the ledger, opt-outs, caps, cooling-off, non-response, erasure.

Invented data (the tasting club, with invented answer probabilities): internal checks of the
campaign's own rules, except where a source is named.
"""
import sqlite3

import numpy as np
import pandas as pd
import pytest
from scipy.stats import spearmanr

from hybrid import HybridFactorModel, InputError
from hybrid.datasets.club import tasting_club
from hybrid.io.ledger import SCHEMA_VERSION, Ledger
from hybrid.planning.waves import Campaign


@pytest.fixture(scope="module")
def club():
    return tasting_club(n_members=500, n_lots=80, n_new=0, seed=5)


@pytest.fixture(scope="module")
def fitted(club):
    with pytest.warns(Warning):
        return HybridFactorModel(rank=4, epochs=10, schema=club.schema).fit(club.ratings, club.lots)


def _copy(m):
    import copy
    return copy.deepcopy(m)


def _answers(asks, chance, rng):
    """Invented answers: each ask answered with the user's true chance, a rating near the expected."""
    hit = asks[rng.random(len(asks)) < chance.reindex(asks["user"]).to_numpy()]
    rating = np.clip(np.round(hit["expected_rating"].to_numpy() + rng.normal(0, 0.6, len(hit))), 1, 5)
    return pd.DataFrame({"user": hit["user"].to_numpy(), "item": hit["item"].to_numpy(), "rating": rating})


def _start(tmp_path, m, **kw):
    return Campaign.start(tmp_path / "c.ledger", m, plan_settings={"k": 5, "draws": 16}, **kw)


def test_waves_honour_opt_outs_caps_and_cooling_off(tmp_path, fitted):
    m = _copy(fitted)
    c = _start(tmp_path, m, budget=400, per_user=3, cooling_off=1)
    rng = np.random.default_rng(0)
    chance = pd.Series(0.4, index=m.user_ids_)
    early_out = list(m.user_ids_[:5])
    c.opt_out(early_out, source="web form")
    _, first = c.plan_wave(m, budget=120)
    assert not first.asks["user"].isin(early_out).any()
    # someone asked in wave 1 opts out before wave 2
    late_out = first.asks["user"].iloc[0]
    c.opt_out([late_out], source="email")
    answers = _answers(first.asks, chance, rng)
    m, info = c.import_answers(m, answers, "wave1.csv")
    assert info["unasked"] == 0 and info["answers"] == len(answers)
    _, second = c.plan_wave(m, budget=120)
    assert not second.asks["user"].isin(early_out + [late_out]).any()
    assert late_out not in set(c.contact_sheet(1)["user"])     # the sheet of wave 1, exported late
    # per_user counts asks over both waves
    every = c.ledger.asks()
    assert every.groupby("user").size().max() <= 3
    # wave 1's unanswered pairs are not asked again in wave 2 (cooling-off of one wave)
    silent = set(zip(first.asks["user"], first.asks["item"])) - set(zip(answers["user"], answers["item"]))
    assert not silent & set(zip(second.asks["user"], second.asks["item"]))
    # in wave 3 only wave 2's pairs (none answered yet) cool off; wave 1's may be asked again
    blocked = c.contacts(m, wave=3).blocked
    held = {(m.user_ids_[u], m.item_ids_[i]) for i, us in blocked.items() for u in us}
    assert held == set(zip(second.asks["user"], second.asks["item"]))


def test_importing_the_same_answers_twice_changes_nothing(tmp_path, fitted):
    m = _copy(fitted)
    c = _start(tmp_path, m, budget=200)
    _, p = c.plan_wave(m, budget=60)
    answers = _answers(p.asks, pd.Series(0.5, index=m.user_ids_), np.random.default_rng(1))
    m, _ = c.import_answers(m, answers, "wave1.csv")
    fp = m.fingerprint_
    shuffled = answers.sample(frac=1.0, random_state=3)     # the same answers, re-exported
    with pytest.raises(InputError, match="imported before"):
        c.import_answers(m, shuffled, "wave1-again.csv")
    assert m.fingerprint_ == fp and len(c.ledger.answers()) == len(answers)
    assert c.ledger.conn.execute("SELECT COUNT(*) FROM imports").fetchone()[0] == 1


def test_a_failure_inside_an_import_leaves_the_ledger_as_it_was(tmp_path, fitted):
    m = _copy(fitted)
    c = _start(tmp_path, m, budget=200)
    _, p = c.plan_wave(m, budget=60)
    led = c.ledger
    rows = [(1, "M0001", "L0001", 4.0), (2, "M0002", "L0002", None)]   # the second row fails inside
    with pytest.raises(TypeError):
        led.record_import(1, "digest", "bad.csv", rows)
    assert led.conn.execute("SELECT COUNT(*) FROM imports").fetchone()[0] == 0
    assert led.conn.execute("SELECT COUNT(*) FROM answers").fetchone()[0] == 0


def test_answers_are_checked_against_the_model_and_the_asks(tmp_path, fitted):
    m = _copy(fitted)
    c = _start(tmp_path, m, budget=200)
    _, p = c.plan_wave(m, budget=40)
    with pytest.raises(InputError, match="user 'nobody' is not in the model"):
        c.import_answers(m, pd.DataFrame({"user": ["nobody"], "item": ["L0001"], "rating": [4.0]}), "x.csv")
    asked = p.asks.iloc[:3]
    unasked_user = next(u for u in m.user_ids_ if u not in set(p.asks["user"]))
    extra = pd.DataFrame({"user": [unasked_user], "item": [asked["item"].iloc[0]], "rating": [3.0]})
    answers = pd.concat([pd.DataFrame({"user": asked["user"], "item": asked["item"], "rating": 4.0}), extra])
    m, info = c.import_answers(m, answers.reset_index(drop=True), "wave1.csv")
    assert info["unasked"] == 1                          # kept (folded in) and flagged
    assert c.ledger.answers()["asked_wave"].isna().sum() == 1


def test_the_ledger_refuses_what_it_cannot_read(tmp_path):
    path = tmp_path / "c.ledger"
    Ledger.create(path, {}).close()
    with pytest.raises(InputError, match="already exists"):
        Ledger.create(path, {})
    conn = sqlite3.connect(path)
    conn.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION + 1),))
    conn.commit()
    conn.close()
    with pytest.raises(InputError, match="newer release"):
        Ledger.open(path)
    (tmp_path / "x.ledger").write_text("not a database")
    with pytest.raises(InputError, match="not a campaign ledger"):
        Ledger.open(tmp_path / "x.ledger")
    journal = sqlite3.connect(path).execute("PRAGMA journal_mode").fetchone()[0]
    assert journal == "wal"


def test_expected_answers_meet_the_answers_that_come(tmp_path, fitted):
    """Known answer probabilities (invented): after the first wave, the expected answers are
    within 10% of those realised, and the estimated propensities are ordered like the true ones."""
    gaps, orders = [], []
    for seed in range(3):
        m = _copy(fitted)
        rng = np.random.default_rng(seed)
        truth = pd.Series(rng.beta(2, 3, len(m.user_ids_)), index=m.user_ids_)
        c = Campaign.start(tmp_path / f"c{seed}.ledger", m, per_user=12, cooling_off=0,
                           plan_settings={"k": 5, "draws": 16, "max_needed": 80, "aim": "gain"})
        expected = realised = 0.0
        for wave in range(1, 5):
            _, p = c.plan_wave(m, budget=150)
            answers = _answers(p.asks, truth, rng)
            if wave > 1:     # the first wave runs on the first_response guess
                expected += p.asks["answer_chance"].sum()
                realised += len(answers)
            m, _ = c.import_answers(m, answers, f"w{wave}.csv")
        gaps.append(abs(expected - realised) / realised)
        contacts = c.contacts(m)
        asked = c.ledger.asks()["user"].value_counts()
        often = pd.Index(m.user_ids_).get_indexer(asked[asked >= 3].index)
        orders.append(spearmanr(contacts.propensity[often], truth.to_numpy()[often]).statistic)
    print("non-response: gaps", np.round(gaps, 3), "spearman", np.round(orders, 3))
    assert np.mean(gaps) < 0.10, gaps
    assert min(orders) > 0.5, orders        # scipy.stats.spearmanr


def test_erasure_leaves_no_trace(tmp_path, fitted, club):
    from hybrid.core.blocks import design
    from hybrid.core.posterior import scaled

    m = _copy(fitted)
    c = _start(tmp_path, m, budget=200)
    _, p = c.plan_wave(m, budget=60)
    person = p.asks["user"].iloc[0]
    c.opt_out([person], source="email")
    m, _ = c.import_answers(m, pd.DataFrame({"user": [person], "item": [p.asks["item"].iloc[0]], "rating": [5.0]}),
                            "wave1.csv")
    old = _copy(m)
    pos = list(m.user_ids_).index(person)
    u, i, _ = m.ratings_
    touched = np.unique(i[u == pos])
    counts = c.erase(person, m)
    assert counts["asks"] >= 1 and counts["answers"] == 1 and counts["optouts"] == 1
    m.save(tmp_path / "after.hybrid")
    c.ledger.close()
    for path in (tmp_path / "after.hybrid", tmp_path / "c.ledger"):
        data = path.read_bytes()
        for encoding in ("utf-8", "utf-32-le", "utf-16-le"):
            assert person.encode(encoding) not in data, (path, encoding)
    assert person not in m.user_ids_ and len(m.user_ids_) == len(old.user_ids_) - 1
    # everything it did not touch is as it was, to the bit
    others = np.setdiff1d(np.arange(len(m.item_ids_)), touched)
    assert np.array_equal(m.item_blocks_[others], old.item_blocks_[others])
    assert np.array_equal(m.factors_.user, np.delete(old.factors_.user, pos, axis=0))
    # each item they rated is the ridge solution around its prior mean from its other raters
    # alone, solved here with numpy.linalg (Hoerl and Kennard 1970's normal equations)
    F = m.factors_
    ub, ut = F.split(F.user)
    R = m.rating_data().by_item
    for item in touched:
        rows = R.indices[R.indptr[item]:R.indptr[item + 1]]
        X = design(ut, ub)[rows]
        y = R.data[R.indptr[item]:R.indptr[item + 1]] - ub[rows]
        P = scaled(m.prior_precision_, m.prior_weight_[[item]])[0]
        prior_mean = np.asarray(m.attributes_[item] @ F.W).ravel()
        prior_mean[0] += m.prior_shift([item])[0]
        z = np.linalg.solve(X.T @ X + P, X.T @ y + P @ prior_mean)
        np.testing.assert_allclose(m.item_blocks_[item], z, rtol=1e-6, atol=1e-9)


def test_the_contact_sheet_has_one_row_per_user(tmp_path, fitted):
    m = _copy(fitted)
    c = _start(tmp_path, m, budget=200, per_user=3)
    _, p = c.plan_wave(m, budget=80)
    sheet = c.contact_sheet()
    assert sheet["user"].is_unique and set(sheet["user"]) == set(p.asks["user"])
    assert sheet["n_items"].sum() == len(p.asks) and (sheet["n_items"] <= 3).all()
    row = sheet.iloc[0]
    assert set(row["items"].split("|")) == set(p.asks.loc[p.asks["user"] == row["user"], "item"])


def test_a_cumulative_export_skips_what_is_in_and_a_wrong_file_is_refused(tmp_path, fitted):
    m = _copy(fitted)
    c = _start(tmp_path, m, budget=300)
    _, p = c.plan_wave(m, budget=60)
    first = _answers(p.asks, pd.Series(0.5, index=m.user_ids_), np.random.default_rng(4))
    half = len(first) // 2
    m, _ = c.import_answers(m, first.iloc[:half], "early.csv")
    # the survey tool exports every answer so far: those already in are skipped, the rest come in
    m, info = c.import_answers(m, first, "all-so-far.csv")
    assert info["already in the model (skipped)"] == half and info["answers"] == len(first) - half
    assert len(c.ledger.answers()) == len(first)
    # the training ratings are not a wave's answers: refused, nothing changed
    u, i, r = m.ratings_
    held = pd.DataFrame({"user": m.user_ids_[u], "item": m.item_ids_[i], "rating": r}).head(1000)
    with pytest.raises(InputError, match="all 1000 answers are ratings the model already holds"):
        c.import_answers(m, held, "ratings.csv")
    stray = held.assign(rating=np.where(held["rating"] < 3, 5.0, 1.0))
    with pytest.raises(InputError, match="never asked for"):
        c.import_answers(m, stray, "ratings-changed.csv")
    assert len(c.ledger.answers()) == len(first)
