"""``hybrid campaign ...``: a sampling campaign run in waves, recorded in one ledger file.

start, plan (the next wave), contacts (its asks for a mail-merge), answers (import and fold in),
progress, opt-out, erase.  The library does the work (:mod:`hybrid.planning.waves`).
"""
from __future__ import annotations

import functools
from pathlib import Path
from typing import List, Optional

import pandas as pd
import typer

from hybrid.app.config import load_config, settings_for
from hybrid.app.workflows import CAUTION, plan_arguments
from hybrid.cli.display import (
    TABLE_HELP,
    Command,
    CountProgress,
    check_format,
    emit,
    emit_mapping,
    guarded,
    note,
    say,
    setting_help,
    use_nouns,
)
from hybrid.cli.plan import show_bought
from hybrid.common.errors import InputError
from hybrid.estimator.model import HybridFactorModel
from hybrid.io.outputs import check_model_output, check_output, write_table
from hybrid.io.tables import read_attributes, read_ratings, read_table, source_name

campaign_app = typer.Typer(add_completion=False, no_args_is_help=True, rich_markup_mode=None,
                           help="Run a sampling campaign in waves, with a ledger of every ask, answer and "
                                "opt-out. " + CAUTION)

LEDGER = typer.Argument(..., metavar="LEDGER", help="The campaign's ledger file (SQLite, e.g. club.ledger).")
MODEL = typer.Argument(..., metavar="MODEL", help="Model file.")
FORMAT = typer.Option("table", "--format", help="table, csv or json.")


def _open(ledger: Path, config=None):
    from hybrid.planning.waves import Campaign

    c = Campaign.open(ledger)
    _OPENED.append(c)
    cfg = load_config(config) if config is not None else c.settings.get("about") or load_config(None)
    use_nouns(cfg)
    return c, cfg


_OPENED = []   # the ledgers a command opened: closed when it ends, however it ends


def _command(name):
    def register(fn):
        @functools.wraps(fn)
        def closing(*args, **kwargs):
            try:
                return fn(*args, **kwargs)
            finally:
                while _OPENED:
                    _OPENED.pop().close()
        campaign_app.command(name, cls=Command)(guarded(closing))
        return fn
    return register


@_command("start")
def start(ledger: Path = LEDGER, model_file: Path = MODEL,
          budget: Optional[int] = typer.Option(None, "--budget", help="Ratings the whole campaign may collect."),
          per_user: Optional[int] = typer.Option(None, "--per-user", help=setting_help("campaign", "per_user")),
          cooling_off: Optional[int] = typer.Option(None, "--cooling-off", help=setting_help("campaign", "cooling_off")),
          first_response: Optional[float] = typer.Option(None, "--first-response",
                                                         help=setting_help("campaign", "first_response")),
          priority: Optional[str] = typer.Option(None, "--priority", help="Attribute column of item priority."),
          config: Optional[Path] = typer.Option(None, "--config", help="Settings (default: the model's)."),
          format: str = FORMAT):
    """Start a campaign on a model: its settings (budget, asks per user, cooling-off, the plan's
    target and k) are fixed in a new ledger file.

    Example: hybrid campaign start club.ledger club.hybrid --budget 1000 --per-user 3
    """
    from hybrid.planning.waves import Campaign

    check_format(format)
    model = HybridFactorModel.load(model_file)
    cfg = settings_for(model, config)
    use_nouns(cfg)
    c = cfg["campaign"]
    plan_settings = plan_arguments(cfg, priority=priority)
    camp = Campaign.start(ledger, model, budget=budget, per_user=c["per_user"] if per_user is None else per_user,
                          cooling_off=c["cooling_off"] if cooling_off is None else cooling_off,
                          first_response=c["first_response"] if first_response is None else first_response,
                          plan_settings=plan_settings, about=cfg)
    _OPENED.append(camp)
    s = camp.settings
    emit_mapping({"budget (ratings)": s["budget"] if s["budget"] is not None else "none (each wave gives its own)",
                  "asks per user, all waves": s["per_user"], "cooling-off (waves)": s["cooling_off"],
                  "answers expected per ask before any are in": s["first_response"],
                  "target": s["plan"]["target"], "k": s["plan"]["k"], "model": model.fingerprint_},
                 format, f"campaign started in {ledger}")
    if format == "table":
        say(CAUTION)


@_command("plan")
def plan_wave(ledger: Path = LEDGER, model_file: Path = MODEL,
              out: Path = typer.Option(..., "--out", help="The wave's plan, one row per item (.csv, .json, .jsonl, .parquet)."),
              asks: Optional[Path] = typer.Option(None, "--asks", help="The wave's asks, one row per (item, user)."),
              budget: Optional[int] = typer.Option(None, "--budget", help="Ratings this wave (default: what the campaign has left)."),
              quiet: bool = typer.Option(False, "--quiet", help="No progress display."),
              format: str = FORMAT):
    """Plan the campaign's next wave: items to buy ratings for, and whom to ask, leaving out
    opted-out users, users at their cap and pairs still cooling off.

    Example: hybrid campaign plan club.ledger club.hybrid --out wave1.csv --asks wave1-asks.csv
    """
    check_format(format)
    for path in (out, asks):
        if path is not None:
            check_output(path)
    camp, _ = _open(ledger)
    model = HybridFactorModel.load(model_file)
    with CountProgress(None, f"planning wave {camp.ledger.last_wave() + 1}", quiet=quiet):
        wave, p = camp.plan_wave(model, budget=budget)
    write_table(p.items, out)
    if asks is not None:
        write_table(p.asks, asks)
    s = p.summary()
    emit_mapping({"wave": wave, "ratings planned": s["ratings planned"], "asks": s["asks"],
                  "expected answers": s["expected answers"],
                  "more items reaching the target with the plan": s["more items reaching the target with the plan"],
                  "budget left before this wave": camp.budget_left() if camp.budget_left() is not None else "no limit"},
                 format, f"wave {wave} planned; plan written to {out}")
    if format == "table":
        show_bought(p.items)
        say(CAUTION)


@_command("contacts")
def contacts(ledger: Path = LEDGER,
             out: Path = typer.Option(..., "--out", help="Contact sheet: one row per user, their items (.csv, ...)."),
             wave: Optional[int] = typer.Option(None, "--wave", help="Which wave (default: the last planned)."),
             format: str = FORMAT):
    """Export a wave's asks ready for a mail-merge or a CRM import: one row per user with the
    items to ask them about. Users who opted out since the wave was planned are left out.

    Example: hybrid campaign contacts club.ledger --out wave1-contacts.csv
    """
    check_format(format)
    check_output(out)
    camp, _ = _open(ledger)
    _check_wave(camp, wave)
    sheet = camp.contact_sheet(wave)
    write_table(sheet, out)
    emit_mapping({"users": len(sheet), "asks": int(sheet["n_items"].sum()) if len(sheet) else 0},
                 format, f"contact sheet written to {out}")
    if format == "table":
        say(CAUTION)


@_command("answers")
def answers(ledger: Path = LEDGER, model_file: Path = MODEL,
            answers_file: str = typer.Argument(..., metavar="ANSWERS", help="The wave's answers (same columns as training)" + TABLE_HELP),
            out: Path = typer.Option(..., "--out", help="The updated model file."),
            wave: Optional[int] = typer.Option(None, "--wave", help="Which wave the answers belong to (default: the last)."),
            new_items: Optional[str] = typer.Option(None, "--new-items", help="Attributes of items new to the model" + TABLE_HELP),
            format: str = FORMAT):
    """Import a wave's answers into the ledger and fold them into a new model through update;
    say what the wave predicted and what came. The same answers imported twice change nothing.

    Example: hybrid campaign answers club.ledger club.hybrid week1.csv --out club-week1.hybrid
    """
    check_format(format)
    check_model_output(out)
    camp, _ = _open(ledger)
    _check_wave(camp, wave)
    model = HybridFactorModel.load(model_file)
    cfg = settings_for(model, None)
    use_nouns(cfg)
    waves = camp.ledger.waves()
    known = set(waves["model_fingerprint"]) | set(waves["folded_into"].dropna())
    if model.fingerprint_ not in known:
        note(f"{model_file} is not a model this campaign planned from or folded answers into "
             "(its fingerprint differs); the answers are folded into it all the same")
    table = read_ratings(answers_file, cfg)
    attrs = None if new_items is None else read_attributes(new_items, cfg, model.features_.spec(), require_all=False)
    # the model is written (atomically) before the ledger records the import: a failure between
    # the two leaves a model the ledger does not count, and importing again is safe
    model, info = camp.import_answers(model, table, source_name(answers_file), wave=wave, attributes=attrs,
                                      save=lambda m: m.save(out))
    row = camp.progress().set_index("wave").loc[info["wave"]]
    emit_mapping({"wave": info["wave"], "answers": info["answers"],
                  "already in the model with the same values (skipped)": info["already in the model (skipped)"],
                  "of them unasked (kept, flagged)": info["unasked"],
                  "asks in the wave": info["asks in the wave"], "response rate": round(float(row["response_rate"]), 3),
                  "items newly trusted": int(row["items_newly_trusted"]),
                  "share of lists predicted to stand": round(float(row["kept_predicted"]), 3),
                  "share of lists seen to stand": round(float(row["kept_seen"]), 3)},
                 format, f"answers folded in; updated model written to {out}")


@_command("progress")
def progress(ledger: Path = LEDGER, format: str = FORMAT):
    """Show the campaign wave by wave: asked, answered, response rate, ratings folded in, items
    newly trusted, budget left, and what each wave expected against what came.

    Example: hybrid campaign progress club.ledger
    """
    check_format(format)
    camp, _ = _open(ledger)
    table = camp.progress()
    if not len(table):
        raise InputError(f"{ledger}: no wave planned yet (hybrid campaign plan)")
    if format != "table":
        emit(table, format)
        return
    emit(_for_screen(table), "table", "the campaign, wave by wave")
    say("Items trusted after: of the items a wave bought ratings for, those at the target once its answers "
        "were folded in. Expected answers, gain and list kept are the planner's estimates when it planned; what "
        "came, the realised gain and the share of each list seen to stand are measured after the answers were "
        "folded in with update.")
    say(CAUTION)


@_command("opt-out")
def opt_out(ledger: Path = LEDGER,
            users: Optional[List[str]] = typer.Argument(None, metavar="USER...", help="Users to put on the do-not-contact list."),
            file: Optional[str] = typer.Option(None, "--file", help="A table of users (its user column)" + TABLE_HELP),
            source: str = typer.Option("request", "--source", help="Where the request came from (kept in the ledger)."),
            format: str = FORMAT):
    """Put users on the campaign's do-not-contact list: no later wave asks them, and contact
    sheets leave them out.

    Example: hybrid campaign opt-out club.ledger M0042 --source email
    """
    check_format(format)
    camp, cfg = _open(ledger)
    names = list(users or [])
    if file is not None:
        col = cfg["ratings"]["user"]
        names += read_table(file, [col], text_columns=[col])[col].astype(str).str.strip().tolist()
    names = [n for n in dict.fromkeys(names) if n]
    if not names:
        raise InputError("name the users who opted out (USER... or --file)")
    added = camp.opt_out(names, source)
    emit_mapping({"named": len(names), "new to the list": added, "on the list": len(camp.ledger.opted_out())},
                 format, "do-not-contact list updated")


@_command("erase")
def erase(ledger: Path = LEDGER, user: str = typer.Argument(..., metavar="USER", help="The person to erase."),
          model_file: Optional[Path] = typer.Option(None, "--model", help="A model to erase them from too."),
          out: Optional[Path] = typer.Option(None, "--out", help="The model without them (with --model)."),
          format: str = FORMAT):
    """Erase a person on request: every ledger row naming them and, with --model, their ratings,
    vector and id from the model (written to --out). Nothing of theirs is kept, not even the
    request: an erased person is unknown to the campaign (and may be asked again if they come back).

    Example: hybrid campaign erase club.ledger M0042 --model club.hybrid --out club-erased.hybrid
    """
    check_format(format)
    if (model_file is None) != (out is None):
        raise InputError("--model and --out go together: the model to erase the person from, and where to write it")
    if out is not None:
        check_model_output(out)
    camp, _ = _open(ledger)
    model = None if model_file is None else HybridFactorModel.load(model_file)
    if model is not None and user not in set(model.user_ids_):
        raise InputError(f"user '{user}' is not in {model_file}; nothing was erased")
    counts = camp.erase(user, model)
    if model is not None:
        model.save(out)
    emit_mapping({"asks removed": counts["asks"], "answers removed": counts["answers"],
                  "opt-outs removed": counts["optouts"],
                  "model": f"written to {out} without them" if out is not None else "not given"},
                 format, "erased")


def _for_screen(t):
    """The progress table as people read it: each expected number beside what came, in one cell."""
    def pair(a, b, f):
        return [("-" if pd.isna(x) else f(x)) + "/" + ("-" if pd.isna(y) else f(y)) for x, y in zip(a, b)]
    return pd.DataFrame({
        "wave": t["wave"], "asked": t["asked"],
        "answers expected / came": pair(t["expected_answers"], t["ratings_folded_in"], lambda v: f"{v:.0f}"),
        "rate": [("-" if pd.isna(v) else f"{v:.0%}") for v in t["response_rate"]],
        "items trusted after / planned": [f"{a}/{b}" for a, b in zip(t["items_newly_trusted"], t["items_planned"])],
        "gain expected / realised": pair(t["expected_gain"], t["realised_gain"], lambda v: f"{v:.2f}"),
        "list kept predicted / seen": pair(t["kept_predicted"], t["kept_seen"], lambda v: f"{v:.2f}"),
        "budget left": ["none" if v is None or pd.isna(v) else f"{int(v)}" for v in t["budget_left"]]})


def _check_wave(camp, wave):
    last = camp.ledger.last_wave()
    if last == 0:
        raise InputError(f"{camp.ledger.path}: no wave planned yet (hybrid campaign plan)")
    if wave is not None and not 1 <= wave <= last:
        raise InputError(f"--wave must be a wave of this campaign, 1 to {last}, found {wave}")
