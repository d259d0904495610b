"""Commands for the campaign analyst: plan, update, calibrate (registered in :mod:`hybrid.cli`)."""
from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from hybrid.app.config import load_config, model_params, settings_for, with_engine
from hybrid.app.nouns import nouns_of
from hybrid.app.workflows import CAUTION, STATUS_WORDS, plan_arguments
from hybrid.cli.display import (
    ADDRESS_HELP,
    ENGINE_HELP,
    TABLE_HELP,
    CountProgress,
    check_format,
    emit,
    emit_mapping,
    say,
    setting_help,
    use_nouns,
)
from hybrid.common.errors import InputError
from hybrid.estimator.model import HybridFactorModel
from hybrid.estimator.updates import import_counts
from hybrid.io.outputs import atomic_path, check_model_output, check_output, write_table
from hybrid.io.tables import read_attributes, read_item_list, read_plan, read_ratings, read_training_tables


def plan_command(
        model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file."),
        out: Path = typer.Option(..., "--out", help="The plan, one row per item (.csv, .json, .jsonl, .parquet)."),
        asks: Optional[Path] = typer.Option(None, "--asks", help="Whom to ask: item, user, rank, gain, expected rating."),
        target: Optional[float] = typer.Option(None, "--target", help=setting_help("plan", "target")),
        k: Optional[int] = typer.Option(None, "--k", help=setting_help("plan", "k")),
        budget: Optional[int] = typer.Option(None, "--budget", help=setting_help("plan", "budget")),
        per_user: Optional[int] = typer.Option(None, "--per-user", help=setting_help("plan", "per_user")),
        per_item: Optional[int] = typer.Option(None, "--per-item", help=setting_help("plan", "per_item")),
        priority: Optional[str] = typer.Option(None, "--priority", help="Attribute column of item priority."),
        aim: Optional[str] = typer.Option(None, "--aim", help=setting_help("plan", "aim")),
        max_needed: Optional[int] = typer.Option(None, "--max-needed", help=setting_help("plan", "max_needed")),
        new_items: Optional[str] = typer.Option(None, "--new-items", help="Attribute table of unrated items to include" + TABLE_HELP),
        only: Optional[str] = typer.Option(None, "--items", help="Plan only the items in this table's item column" + TABLE_HELP),
        config: Optional[Path] = typer.Option(None, "--config", help="Settings (default: the model's)."),
        engine: Optional[str] = typer.Option(None, "--engine", help=ENGINE_HELP),
        address: Optional[str] = typer.Option(None, "--address", help=ADDRESS_HELP),
        quiet: bool = typer.Option(False, "--quiet", help="No progress display."),
        format: str = typer.Option("table", "--format", help="table, csv or json (the summary).")):
    """Plan a sampling campaign: which items are under-covered, how many ratings each needs, whom to ask.

    Ratings are personal data, and a campaign contacts people: ask only customers who agreed
    to be asked, honour opt-outs, and follow the data-protection law that applies to you.
    Every number here is an estimate.

    Example: hybrid plan club.hybrid --budget 500 --per-user 3 --out plan.csv --asks asks.csv
    """
    from hybrid.engines.cluster import engine_client
    from hybrid.planning.planner import plan

    check_format(format)
    for path in (out, asks):
        if path is not None:
            check_output(path)
    model = HybridFactorModel.load(model_file)
    cfg = settings_for(model, config)
    use_nouns(cfg)
    if new_items is not None:
        model.add_items(read_attributes(new_items, cfg, model.features_.spec(), require_all=False))
    chosen = None if only is None else read_item_list(only, cfg, model.item_ids_)
    with engine_client(with_engine(load_config(config), engine, address)) as client, \
            CountProgress(None, f"planning {len(model.item_ids_) if chosen is None else len(chosen)} items",
                          quiet=quiet):
        result = plan(model, **plan_arguments(cfg, target=target, k=k, aim=aim, max_needed=max_needed),
                      budget=budget,
                      per_user=per_user, priority=priority, per_item=per_item, items=chosen, client=client)
    write_table(result.items, out)
    if asks is not None:
        write_table(result.asks, asks)
    summary = result.summary()
    summary.update({"candidates": f"{result.settings['pool_size']} ({result.settings['pool_rule']})"})
    emit_mapping(summary, format, f"plan written to {out}")
    if format == "table":
        items = result.items
        if (items["planned"] > 0).any():
            show_bought(items)
        else:
            top = items[items["status"] != "trusted"].sort_values(
                ["needed", "stability"], ascending=[False, True], na_position="first").head(10)
            levels = _level_columns(items)
            shown = top[["item", "ratings", "stability"] + levels + ["needed_label"]].rename(
                columns={"needed_label": "to the target", **{c: "to " + c[len("needed_"):] for c in levels}})
            emit(shown, "table", "the items that need the most, and the ratings each needs to reach each level "
                                 "(no budget given: --budget N plans)")
        say(STATUS_WORDS)
        say(CAUTION)


def _level_columns(items):
    return [c for c in items.columns if c.startswith("needed_") and c != "needed_label"]


def show_bought(items):
    """What a budget buys, on screen: each item it gives ratings to (most first), the asks and the
    answers expected, its stability after them and the share of its list expected to stand."""
    bought = items[items["planned"] > 0]
    if not len(bought):
        say("The budget buys no item's ratings (nothing below the target reaches it within the budget).")
        return
    top = bought.sort_values(["planned", "stability"], ascending=[False, True]).head(10)
    shown = top[["item", "planned", "asks", "expected_answers", "stability_after", "expected_kept"]].round(
        {"expected_answers": 1, "stability_after": 3, "expected_kept": 3})
    emit(shown.rename(columns={"expected_answers": "answers expected", "stability_after": "stability after",
                               "expected_kept": "list kept"}),
        "table", f"the items the budget buys ({len(bought)}; the first 10 by ratings planned)")
    say("Planned: ratings the budget gives it; asks: people to ask for them (not everyone answers). List kept: "
        "the share of each item's neighbour list expected to stand once its answers are folded in with update "
        "(the number the campaign can check afterwards).")


def update_command(
        model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file."),
        new_ratings: str = typer.Argument(..., help="New ratings (same columns as training)" + TABLE_HELP),
        out: Path = typer.Option(..., "--out", help="Updated model file."),
        new_items: Optional[str] = typer.Option(None, "--new-items", help="Attributes of items new to the model" + TABLE_HELP),
        config: Optional[Path] = typer.Option(None, "--config", help="Settings (default: the model's)."),
        format: str = typer.Option("table", "--format", help="table, csv or json.")):
    """Fold new ratings into a model mid-campaign, re-solving only the items and users they touch.

    A file whose every rating is already in the model with the same value (imported before)
    is refused and nothing is written.

    Example: hybrid update club.hybrid week1.csv --out club-week1.hybrid
    """
    check_format(format)
    check_model_output(out)
    model = HybridFactorModel.load(model_file)
    cfg = settings_for(model, config)
    use_nouns(cfg)
    table = read_ratings(new_ratings, cfg)
    attrs = None
    if new_items is not None:
        attrs = read_attributes(new_items, cfg, model.features_.spec(), require_all=False)
    before = int(model.item_counts_.sum())
    counts = import_counts(model, table)
    model.fold_in(table, attributes=attrs)     # refuses a file whose every rating is already in
    model.save(out)
    emit_mapping({"ratings added": counts["added"], "ratings changed": counts["changed"],
                  "ratings already in the model (unchanged)": counts["unchanged"],
                  "ratings now": int(model.item_counts_.sum()),
                  "ratings before": before, "items touched": int(table["item"].nunique()),
                  "users touched": int(table["user"].nunique())}, format, f"updated model written to {out}")


PROTOCOLS = ("hidden", "update")


def calibrate_command(
        ratings: str = typer.Argument(..., help="Ratings table" + TABLE_HELP),
        attributes: str = typer.Argument(..., help="Item attribute table" + TABLE_HELP),
        config: Optional[Path] = typer.Option(None, "--config", help="TOML settings file."),
        probes: int = typer.Option(120, "--probes", help="How many well-rated items to probe."),
        seed: int = typer.Option(0, "--seed", help="Seed of the probe draw."),
        protocol: str = typer.Option("hidden", "--protocol",
                                     help="hidden: stability against the list with all ratings; update: the share of "
                                          "lists that stands after update, as a campaign sees it."),
        quiet: bool = typer.Option(False, "--quiet", help="No progress display."),
        format: str = typer.Option("table", "--format", help="table, csv or json.")):
    """Check the planner's numbers: hide ratings of well-rated items and compare predicted with actual.

    With --protocol update, each probe is fitted with its first n ratings, its other ratings are
    folded in with update, and the share of its list predicted to stand is compared with the share
    that did.

    Example: hybrid calibrate ratings.csv lots.csv --config coffee.toml --probes 60 --protocol update
    """
    from hybrid.planning.calibration import calibrate, calibrate_updates

    check_format(format)
    if protocol not in PROTOCOLS:
        raise InputError(f"--protocol must be one of {', '.join(PROTOCOLS)}, found {protocol!r}")
    cfg = load_config(config)
    use_nouns(cfg)
    params = model_params(cfg)
    table, attrs = read_training_tables(ratings, attributes, cfg, params["schema"])
    params["holdout"] = 0.0
    with CountProgress(0, "calibrating", quiet=quiet) as bar:
        run = calibrate if protocol == "hidden" else calibrate_updates
        result = run(table, attrs, params, n_probe=probes, k=cfg["plan"]["k"], draws=cfg["plan"]["draws"],
                     seed=seed, on_step=bar.step)
    emit(result.round(4), format, "predicted against actual stability of probed items" if protocol == "hidden"
         else "share of probed items' lists predicted against seen to stand after update")


def report_command(
        model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file."),
        out: Path = typer.Option(..., "--out", help="HTML file to write."),
        plan_file: Optional[Path] = typer.Option(None, "--plan", help="A plan from `hybrid plan` (else one is made)."),
        by: Optional[str] = typer.Option(None, "--by", help="Attribute column to count statuses by."),
        campaign: Optional[Path] = typer.Option(None, "--campaign", help="A campaign's ledger: adds its waves."),
        config: Optional[Path] = typer.Option(None, "--config", help="Settings (default: the model's)."),
        quiet: bool = typer.Option(False, "--quiet", help="No progress display.")):
    """Write one self-contained HTML report with plots for the campaign meeting.

    Example: hybrid report club.hybrid --plan plan.csv --campaign club.ledger --out report.html
    """
    from hybrid.app.report import build_report
    from hybrid.planning.planner import plan

    check_output(out, "report")
    model = HybridFactorModel.load(model_file)
    cfg = settings_for(model, config)
    use_nouns(cfg)
    p = cfg["plan"]
    progress = None
    if campaign is not None:
        from hybrid.planning.waves import Campaign
        with Campaign.open(campaign) as camp:
            progress = camp.progress()
    with CountProgress(None, "writing the report", quiet=quiet):
        items = read_plan(plan_file) if plan_file is not None else plan(model, **plan_arguments(cfg)).items
        unknown = set(items["item"].astype(str)) - set(model.item_ids_)
        if unknown:
            raise InputError(f"the plan lists item '{sorted(unknown)[0]}', which the model does not know",
                             file=str(plan_file))
        page = build_report(model, items, k=p["k"], target=p["target"], draws=p["draws"], seed=p["seed"], by=by,
                            liked=cfg["score"]["liked"], interval=cfg["score"]["interval"], nouns=nouns_of(cfg),
                            progress=progress)
    with atomic_path(out) as tmp:
        tmp.write_text(page, encoding="utf-8")
    say(f"report written to {out} ({len(page) / 1e6:.2f} MB)")
