"""The steps the command line and the demo share, so that both run exactly the same thing."""
from __future__ import annotations

from pathlib import Path

from hybrid.app.config import model_params
from hybrid.common.limits import check_score
from hybrid.engines.cluster import engine_client
from hybrid.engines.engine import Engine
from hybrid.estimator.model import HybridFactorModel
from hybrid.io.tables import read_training_tables

# what the planner's statuses mean, on every screen and in the report that shows them
STATUS_WORDS = ("Under-covered: its neighbour list has not settled, it needs more ratings (whatever its count). "
                "Trusted: its stability is at or above the target. Stability: the expected share of its "
                "neighbour list that stays once its vector is known.")

# shown by every screen that plans or reports a campaign
CAUTION = ("Ratings are personal data, and a campaign contacts people: ask only customers who agreed "
           "to be asked, honour opt-outs, and follow the data-protection law that applies to you. "
           "Every number here is an estimate.")


def train_model(ratings: str | Path, attributes: str | Path, cfg: dict, on_epoch=None) -> HybridFactorModel:
    """Read both tables, fit, and keep the settings in the model (``hybrid train`` and the demo)."""
    params = model_params(cfg)
    table, attrs = read_training_tables(ratings, attributes, cfg, params["schema"])
    with engine_client(cfg) as client:
        # a cluster started here serves the fit by its address
        engine = Engine.from_settings(cfg["engine"], client.scheduler.address if client is not None else None)
        model = HybridFactorModel(**params).fit(table, attrs, on_epoch=on_epoch, engine=engine)
    model.set_fitted(settings_=cfg)
    return model


def plan_arguments(cfg: dict, **flags) -> dict:
    """The keyword arguments of :func:`hybrid.plan` from settings, with any flag that was given
    (not ``None``) in place of its setting: ``hybrid plan``, ``hybrid report`` and the demo all
    plan through this, so they plan alike."""
    p = cfg["plan"]
    args = {"target": p["target"], "k": p["k"], "seed": p["seed"], "draws": p["draws"],
            "max_needed": p["max_needed"], "aim": p["aim"], "responders": p["responders"],
            # 'likely' responders are those expected to give the liked score or more
            "responder_threshold": p["responder_threshold"] or cfg["score"]["liked"],
            "candidate_min_ratings": p["candidate_min_ratings"], "levels": p["levels"]}
    args.update({name: value for name, value in flags.items() if value is not None})
    return args


def score_arguments(cfg: dict, **flags) -> dict:
    """The keyword arguments of :func:`hybrid.estimator.batch.score_items` from settings, with
    any flag that was given in place of its setting (``hybrid score`` and the demo)."""
    args = dict(cfg["score"])
    args.update({name: value for name, value in flags.items() if value is not None})
    check_score(**args)   # before any use of them (a chunk of 0 sizes a progress bar)
    return args
