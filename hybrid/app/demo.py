"""The tasting-club demo: every step a user would run, and a short story of what it found."""
from __future__ import annotations

import shutil
import time
from pathlib import Path

import numpy as np
import pandas as pd

from hybrid.app.config import load_config
from hybrid.app.nouns import nouns_of
from hybrid.datasets.club import DEMO_CONFIG, tasting_club, write_sample_database, write_samples


def run_demo(folder, seed: int = 7, say=print) -> dict:
    """Write the club's files in ``folder``, train, score the new lots and tell the story.

    Returns the paths written, by name.
    """
    from hybrid.app.workflows import score_arguments, train_model
    from hybrid.estimator.batch import score_items, write_scores
    from hybrid.io.tables import read_attributes

    t0 = time.perf_counter()
    folder = Path(folder)
    club = tasting_club(seed=seed)
    paths = write_samples(folder, club)
    write_sample_database(folder / "club.db", paths)   # the same tables, as a shop's database holds them
    paths["config"] = folder / "coffee.toml"
    shutil.copyfile(DEMO_CONFIG, paths["config"])
    cfg = load_config(paths["config"])
    say(f"The tasting club (invented): {club.ratings['user'].nunique():,} members have given "
        f"{len(club.ratings):,} ratings to {club.ratings['item'].nunique()} lots; "
        f"{len(club.new_lots)} new lots arrive with none.")
    counts = club.ratings["item"].value_counts()
    say(f"Coverage is uneven: {int((counts >= 100).sum())} lots have 100 or more ratings, "
        f"{int((counts < 5).sum())} have fewer than 5, {len(club.lots) - len(counts)} have none.")

    model = train_model(paths["ratings"], paths["lots"], cfg)
    new = read_attributes(paths["new_lots"], cfg, model.features_.spec(), require_all=False)
    model.add_items(new)   # the new lots join the catalogue with projected vectors
    paths["model"] = folder / "club.hybrid"
    model.save(paths["model"])
    m = model.metrics_
    spread = float(np.sqrt(np.mean((club.ratings["rating"] - club.ratings["rating"].mean()) ** 2)))
    say(f"Trained a rank-{model.rank} model in {m['seconds']:.1f} s: validation RMSE "
        f"{m['valid_rmse']:.3f} on held-out ratings (the ratings' own spread is {spread:.3f}).")

    scored = pd.concat(list(score_items(model, new, **score_arguments(cfg))))
    paths["scores"] = folder / "new_lots_scored.csv"
    write_scores([scored], paths["scores"], reasons=cfg["score"]["reasons"])
    best = scored.nlargest(3, "expected_rating")
    say(f"Scored the {len(scored)} new lots from their attributes alone (estimates):")
    for row in best.itertuples():
        lot = club.new_lots.loc[row.item]
        near = ", ".join(i for i, _ in row.neighbours[:3])
        reason = ", ".join(f"{name} {effect:+.2f}" for name, effect in row.reasons[:2])
        say(f"  {row.item} {lot['name']} ({lot['region']}, {lot['process']}, notes: {lot['notes']}): "
            f"expected {row.expected_rating:.2f} (80% interval {row.expected_low:.2f} to {row.expected_high:.2f}; "
            f"most from {reason}), {row.liked_share:.0%} of members likely to give "
            f"{cfg['score']['liked']:g}+; neighbours {near}")
    p = _campaign(model, new, cfg, folder, paths, say)
    _, progress = _waves(model.__class__.load(paths["model"]), cfg, folder, paths, say)
    _report(model, p, cfg, folder, paths, progress)
    say(f"Files are in {folder}/ (ratings, lots, new lots and the same in club.db, settings, model, scores, plan, asks, "
        f"week1 answers to try `hybrid update`, the campaign's ledger, its waves' plans, contact sheets, answers and "
        f"models, report.html). Done in {time.perf_counter() - t0:.1f} s.")
    return paths


def _first_answers(asks, model, share=0.3, seed=0):
    """Invented answers of a share of the asked members (for trying `hybrid update`)."""
    rng = np.random.default_rng(seed)
    picked = asks[rng.random(len(asks)) < share]
    noise = rng.normal(0, 0.6, len(picked))
    score = np.clip(np.round((picked["expected_rating"].to_numpy() + noise) * 2) / 2, 1.0, 5.0)
    return pd.DataFrame({"member": picked["user"].to_numpy(), "lot": picked["item"].to_numpy(), "rating": score})


def _campaign(model, new, cfg, folder, paths, say, budget=500, per_user=3):
    """Plan a sampling campaign for the whole catalogue, new lots included."""
    from hybrid.app.workflows import CAUTION, plan_arguments
    from hybrid.io.outputs import write_table
    from hybrid.planning.planner import plan

    p = plan(model, **plan_arguments(cfg), budget=budget, per_user=per_user, priority="margin")
    paths["plan"], paths["asks"] = folder / "plan.csv", folder / "asks.csv"
    write_table(p.items, paths["plan"])
    write_table(p.asks, paths["asks"])
    paths["week1"] = folder / "week1.csv"
    write_table(_first_answers(p.asks, model), paths["week1"])
    s = p.summary()
    items = p.items
    say(f"Planner (top-{cfg['plan']['k']} neighbour lists, target stability {cfg['plan']['target']:g}): "
        f"{s['trusted']} lots trusted, {s['under-covered']} under-covered, {s['no ratings yet']} with no ratings yet.")
    reach = items[items["needed"].notna() & (items["needed"] > 0)]
    if len(reach):
        say(f"  Of the lots not yet trusted, {len(reach)} can get there within {cfg['plan']['max_needed']} more "
            f"ratings (median {int(reach['needed'].median())}); the rest need more than that.")
    say(f"  A {budget}-rating campaign weighted by margin, at most {per_user} asks per member, would bring "
        f"{s['more items reaching the target with the plan']} more lots to the target "
        f"({s['asks']} asks to {p.asks['user'].nunique()} members, {s['expected answers']:g} answers expected: "
        "not everyone answers).")
    say(f"  {CAUTION}")
    return p


def _report(model, p, cfg, folder, paths, progress):
    from hybrid.app.report import build_report
    from hybrid.io.outputs import atomic_path
    paths["report"] = folder / "report.html"
    with atomic_path(paths["report"]) as tmp:
        tmp.write_text(build_report(model, p.items, k=cfg["plan"]["k"], target=cfg["plan"]["target"],
                                    liked=cfg["score"]["liked"], interval=cfg["score"]["interval"],
                                    nouns=nouns_of(cfg), progress=progress),
                       encoding="utf-8")


def _invented_answers(asks, chance, seed):
    """Invented answers to a wave's asks: each member answers with their own invented chance, a
    rating near their expected one (half steps, 1 to 5)."""
    rng = np.random.default_rng(seed)
    picked = asks[rng.random(len(asks)) < chance.reindex(asks["user"]).to_numpy()]
    score = np.clip(np.round((picked["expected_rating"].to_numpy() + rng.normal(0, 0.6, len(picked))) * 2) / 2, 1, 5)
    return pd.DataFrame({"member": picked["user"].to_numpy(), "lot": picked["item"].to_numpy(), "rating": score})


def _waves(model, cfg, folder, paths, say, budget=600, per_wave=250, seed=11):
    """A campaign in two waves, recorded in club.ledger: plan, contact, invented answers (most
    members do not answer), fold them in, one member opts out between the waves."""
    from hybrid.app.workflows import plan_arguments
    from hybrid.io.outputs import write_table
    from hybrid.io.tables import read_ratings
    from hybrid.planning.waves import Campaign

    ledger = folder / "club.ledger"
    for stale in (ledger, folder / "club.ledger-wal", folder / "club.ledger-shm"):
        stale.unlink(missing_ok=True)     # a demo run starts its campaign afresh
    camp = Campaign.start(ledger, model, budget=budget, per_user=3, cooling_off=2,
                          plan_settings={**plan_arguments(cfg), "priority": "margin"}, about=cfg)
    rng = np.random.default_rng(seed)
    # each member's invented chance of answering: most answer rarely, keen raters more often
    chance = pd.Series(np.clip(rng.beta(1.5, 3.5, len(model.user_ids_)) * (0.6 + model.user_counts_ /
                                                                            model.user_counts_.mean() * 0.4), 0, 1),
                       index=model.user_ids_)
    paths["ledger"] = ledger
    for wave in (1, 2):
        number, p = camp.plan_wave(model, budget=per_wave)
        paths[f"wave{wave}_plan"], paths[f"wave{wave}_contacts"] = folder / f"wave{wave}-plan.csv", folder / f"wave{wave}-contacts.csv"
        write_table(p.items, paths[f"wave{wave}_plan"])
        write_table(camp.contact_sheet(number), paths[f"wave{wave}_contacts"])
        answers = _invented_answers(p.asks, chance, seed + wave)
        paths[f"wave{wave}_answers"] = folder / f"wave{wave}-answers.csv"
        write_table(answers, paths[f"wave{wave}_answers"])
        if wave == 1:
            quitter = str(p.asks["user"].iloc[0])
            camp.opt_out([quitter], source="email")
        model, _ = camp.import_answers(model, read_ratings(paths[f"wave{wave}_answers"], cfg),
                                       f"wave{wave}-answers.csv")
        paths[f"wave{wave}_model"] = folder / f"club-wave{wave}.hybrid"
        model.save(paths[f"wave{wave}_model"])
    progress = camp.progress()
    say(f"A campaign in two waves (club.ledger; the answers are invented, and most members do not answer), "
        f"budget {budget} ratings, {per_wave} a wave, at most 3 asks per member over the campaign:")
    for row in progress.itertuples():
        say(f"  Wave {row.wave}: {row.asked} asks, {int(round(row.expected_answers))} answers expected; "
            f"{row.answered} came ({row.response_rate:.0%}); {row.items_newly_trusted} of {row.items_planned} lots "
            f"newly trusted; share of their lists predicted to stand {row.kept_predicted:.2f}, seen {row.kept_seen:.2f}.")
    say(f"  Member {quitter} opted out after wave 1: wave 2 did not ask them "
        f"({int((camp.ledger.asks(2)['user'] == quitter).sum())} asks).")
    camp.ledger.close()
    return model, progress
