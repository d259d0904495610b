"""The command line: a thin typer face over the library.

Every command prints tables on a terminal (``--format csv|json`` for
machines), writes files atomically, and answers bad input with one line on
stderr and exit code 2.
"""
from __future__ import annotations

from pathlib import Path
from typing import Optional

import pandas as pd
import typer

from hybrid import __version__
from hybrid.app.config import load_config, model_params, settings_for, with_engine
from hybrid.app.workflows import score_arguments, train_model
from hybrid.cli.display import (
    ADDRESS_HELP,
    ENGINE_HELP,
    PARTITIONS_HELP,
    TABLE_HELP,
    Command,
    CountProgress,
    EpochProgress,
    check_format,
    emit,
    emit_mapping,
    guarded,
    note,
    say,
    setting_help,
    use_nouns,
)
from hybrid.common.errors import InputError, did_you_mean, did_you_mean_id
from hybrid.estimator.model import HybridFactorModel
from hybrid.io.outputs import check_model_output, check_output
from hybrid.io.tables import read_attributes, source_name

app = typer.Typer(add_completion=False, no_args_is_help=True, rich_markup_mode=None,
                  help="Score new, unrated catalogue items from their attributes, and plan "
                       "how many ratings each needs. Scores are estimates.")


def _show_version(value: bool):
    if value:
        say(__version__)
        raise typer.Exit()


@app.callback()
def _options(show_version: bool = typer.Option(False, "--version", callback=_show_version, is_eager=True,
                                                help="Print the version and exit.")):
    """Score new, unrated catalogue items from their attributes, and plan how many ratings
    each needs. Scores are estimates."""


@app.command(cls=Command)
@guarded
def train(ratings: str = typer.Argument(..., help="Ratings table" + TABLE_HELP),
          attributes: str = typer.Argument(..., help="Item attribute table, one row per item" + TABLE_HELP),
          config: Optional[Path] = typer.Option(None, "--config", help="TOML settings file."),
          out: Path = typer.Option(..., "--out", help="Model file to write."),
          quiet: bool = typer.Option(False, "--quiet", help="No progress bar."),
          engine: Optional[str] = typer.Option(None, "--engine", help=ENGINE_HELP),
          address: Optional[str] = typer.Option(None, "--address", help=ADDRESS_HELP),
          partitions: Optional[int] = typer.Option(None, "--partitions", help=PARTITIONS_HELP),
          format: str = typer.Option("table", "--format", help="table, csv or json.")):
    """Fit the joint model and write a model file.

    Example: hybrid train ratings.csv lots.csv --config coffee.toml --out club.hybrid
    """
    check_format(format)
    check_model_output(out)
    cfg = with_engine(load_config(config), engine, address, partitions)
    use_nouns(cfg)
    with EpochProgress(model_params(cfg)["epochs"], quiet) as progress:
        model = train_model(ratings, attributes, cfg, on_epoch=progress)
    model.save(out)
    emit_mapping(_summary(model), format, f"trained {out}")


def _penalty_search(path) -> str:
    if not path:
        return "off (all penalties given)"
    best = min(e for _, e in path)
    return f"{len(path)} trials, {path[0][1]:.4f} at the start, {best:.4f} chosen"


def _summary(model) -> dict:
    m = model.metrics_
    # counts from the model as it is now (items may have been added, ratings folded in)
    return {"users": len(model.user_ids_), "items": len(model.item_ids_),
            "rated items": int((model.item_counts_ > 0).sum()), "ratings fitted": int(model.item_counts_.sum()),
            "ratings held out (to check the fit)": m["n_holdout"], "features": m["n_features"],
            "rank fitted": model.rank_, "rank allowed": model.rank,
            "rank search (held-out RMSE by rank)":
                ", ".join(f"{r}: {e:.4f}" for r, e in model.rank_path_) or "off",
            # principal directions, largest first; "with signal" holds 90% of the variance
            "prior spread by dimension (sd)": ", ".join(f"{v:.3f}" for v in model.dimension_spread_),
            "dimensions with signal": model.dimensions_with_signal_,
            "user penalty": model.lam_user_, "item penalty": model.lam_item_, "map penalty": model.lam_map_,
            "penalty search (held-out RMSE)": _penalty_search(model.penalty_path_),
            "epochs run": m["epochs_run"], "objective": round(m["objective"], 3),
            "train RMSE": round(m["train_rmse"], 4),
            "validation RMSE (final model)": None if m["valid_rmse"] is None else round(m["valid_rmse"], 4),
            "residual variance": round(m["sigma2"], 4),
            "launch offset (new items' bias)": round(model.launch_offset_, 4), "seconds": round(m["seconds"], 2),
            # models saved before the stages were timed have none
            "seconds by stage": ", ".join(f"{k} {v:.2f}" for k, v in m.get("stage_seconds", {}).items()
                                          if v >= 0.005) or "not recorded"}


_SHOWN = ["item", "content_only", "expected_rating", "expected_low", "expected_high", "liked_share"]


def _check_sort(column: str | None, kept: list) -> None:
    """Refuse, before any work, a --sort column the scores will not have as one value per item."""
    from hybrid.estimator.batch import SCALAR

    if column is not None and column not in (*SCALAR, *kept):
        raise InputError(f"--sort: no output column '{column}' to sort by{did_you_mean(column, [*SCALAR, *kept])}"
                         f"; one of {', '.join([*SCALAR, *kept])}")


def _sorted(chunks, column: str):
    """Every chunk's rows, highest ``column`` first (text A to Z): the rows of a whole file, which
    are small beside the item x user blocks that the chunks bound."""
    rows = pd.concat(list(chunks), ignore_index=True)
    numeric = pd.api.types.is_numeric_dtype(rows[column])
    yield rows.sort_values(column, ascending=not numeric, kind="stable")


@app.command(cls=Command)
@guarded
def score(model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file."),
          new_items: str = typer.Argument(..., help="Attribute table of items to score" + TABLE_HELP),
          out: str = typer.Option(..., "--out", help="Output: .csv, .json, .jsonl, .parquet, or a database table (URL#table)."),
          config: Optional[Path] = typer.Option(None, "--config", help="Settings (default: the model's)."),
          liked: Optional[float] = typer.Option(None, "--liked", help=setting_help("score", "liked")),
          audience: Optional[int] = typer.Option(None, "--audience", help=setting_help("score", "audience")),
          audience_by: Optional[str] = typer.Option(None, "--audience-by",
                                                    help=setting_help("score", "audience_by")),
          neighbours: Optional[int] = typer.Option(None, "--neighbours", help=setting_help("score", "neighbours")),
          interval: Optional[float] = typer.Option(None, "--interval", help=setting_help("score", "interval")),
          chunk: Optional[int] = typer.Option(None, "--chunk", help=setting_help("score", "chunk")),
          keep: Optional[str] = typer.Option(None, "--keep", help="Columns of the file to carry into the output, "
                                             "comma-separated (default: its name-like columns, such as name)."),
          sort: Optional[str] = typer.Option(None, "--sort", help="Output column to sort by, highest first."),
          quiet: bool = typer.Option(False, "--quiet", help="No progress bar."),
          engine: Optional[str] = typer.Option(None, "--engine", help=ENGINE_HELP),
          address: Optional[str] = typer.Option(None, "--address", help=ADDRESS_HELP),
          format: str = typer.Option("table", "--format", help="table, csv or json (the summary).")):
    """Score items no one has rated: expected rating with its interval, reasons, audience, neighbours.

    Example: hybrid score club.hybrid new_lots.csv --out scored.csv --sort expected_rating
    """
    from hybrid.engines.cluster import engine_client
    from hybrid.estimator.batch import name_like, score_items, write_scores

    check_format(format)
    check_output(out)
    model = HybridFactorModel.load(model_file)
    cfg = settings_for(model, config)
    use_nouns(cfg)
    where = with_engine(load_config(config), engine, address)  # where to run is not the model's
    attrs = read_attributes(new_items, cfg, model.features_.spec(), require_all=False)
    kept = name_like(attrs.columns) if keep is None else [c.strip() for c in keep.split(",") if c.strip()]
    _check_sort(sort, kept)
    seen = {"best": pd.DataFrame(), "edited": 0}
    args = score_arguments(cfg, liked=liked, audience=audience, audience_by=audience_by, neighbours=neighbours,
                           interval=interval, chunk=chunk)

    def watch(gen, bar):
        # the ten best of the whole file, and the rated items whose row differs from the
        # attributes they were fitted with, kept as the chunks stream past (one held at a time)
        for df in gen:
            shown = [c for c in ["item", *kept, *_SHOWN[1:], "neighbours"] if c in df.columns]
            seen["best"] = pd.concat([seen["best"], df[shown]]).nlargest(10, "expected_rating")
            seen["edited"] += int((df["attributes_changed"] & ~df["content_only"]).sum())
            bar.advance(len(df))
            yield df

    with engine_client(where) as client, CountProgress(len(attrs), "items scored", -(-len(attrs) // args["chunk"]),
                                                       quiet) as bar:
        chunks = watch(score_items(model, attrs, **args, keep=kept, client=client), bar)
        n = write_scores(chunks if sort is None else _sorted(chunks, sort), out, reasons=args["reasons"])
    if seen["edited"]:
        note(f"{seen['edited']} item(s) have ratings in the model and attributes in the file that differ from those "
             "it was fitted with: they are scored from their fitted vectors (column attributes_changed); "
             "retrain to fit the new attributes")
    top = seen["best"]
    if len(top):
        top = top.assign(neighbours=[v[0][0] if v else "" for v in top["neighbours"]]).rename(
            columns={"neighbours": "first_neighbour"})
        emit(top, format, f"{n} items scored into {source_name(out)}; the {len(top)} with the highest expected rating "
                          f"(expected_low to expected_high: the {args['interval']:.0%} interval; estimates)")


def _describing(model, item: str, new_items: Optional[Path]):
    """The attribute table of ``--new-items`` (or None), once ``item`` is known to be in the model or in it."""
    attrs = None
    use_nouns(settings_for(model, None))
    if new_items is not None:
        attrs = read_attributes(new_items, settings_for(model, None), model.features_.spec(), require_all=False)
    if item not in set(model.item_ids_) and (attrs is None or item not in set(attrs.index)):
        raise InputError(f"item '{item}' is not in the model{did_you_mean_id(item, model.item_ids_)}"
                         + ("" if attrs is not None else "; describe a new item with --new-items FILE"))
    return attrs


@app.command(cls=Command)
@guarded
def why(model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file."),
        item: str = typer.Argument(..., help="Item id."),
        new_items: Optional[str] = typer.Option(None, "--new-items",
                                                 help="Attribute table describing ITEM (its row is the truth for "
                                                      "an item without ratings)."),
        top: int = typer.Option(10, "--top", help="How many attribute effects to list (0: all)."),
        format: str = typer.Option("table", "--format", help="table, csv or json.")):
    """Why an item's expected rating is what it is: the effect of each attribute, and how far its
    ratings moved it.

    Example: hybrid why club.hybrid L0601 --new-items new_lots.csv
    """
    from hybrid.estimator.explain import intervals, reasons

    check_format(format)
    model = HybridFactorModel.load(model_file)
    attrs = _describing(model, item, new_items)
    if top < 0:
        raise InputError(f"--top must be a whole number >= 0, found {top}")
    why_ = reasons(model, [item], attrs)
    iv = intervals(model, [item], attrs).iloc[0]
    rows = [("baseline (an item with none of these attributes)", why_.baseline[0])]
    rows += [(name, effect) for name, effect in why_.top(0, top or None)]
    shown = sum(e for _, e in rows[1:])
    rest = why_.rating[0] - why_.baseline[0] - why_.moved[0] - shown
    if abs(rest) > 5e-7:
        rows.append(("the other attributes together", rest))
    if why_.moved[0] != 0:
        rows.append(("moved by its ratings (from its projection)", why_.moved[0]))
    rows.append(("= the mean user's expected rating", why_.rating[0]))
    table = pd.DataFrame(rows, columns=["part", "effect"])
    emit(table, format, f"why {item} scores {why_.rating[0]:.2f} (80% interval {iv['low']:.2f} to "
                        f"{iv['high']:.2f}); effects on the rating scale, estimates")


@app.command(cls=Command)
@guarded
def related(model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file."),
            item: str = typer.Argument(..., help="Item id."),
            k: int = typer.Option(5, "--k", help="How many neighbours."),
            metric: str = typer.Option("euclidean", "--metric", help="euclidean or cosine."),
            new_items: Optional[str] = typer.Option(None, "--new-items",
                                                     help="Attribute table describing ITEM if the model lacks it."),
            format: str = typer.Option("table", "--format", help="table, csv or json.")):
    """An item's neighbours: the items closest to it by distance between item vectors (rated and projected).

    Example: hybrid related club.hybrid L0007 --k 5 --metric cosine
    """
    check_format(format)
    model = HybridFactorModel.load(model_file)
    attrs = _describing(model, item, new_items)
    emit(model.related([item], k=k, metric=metric, attributes=attrs), format, f"neighbours of {item} ({metric} distance)")


@app.command(cls=Command)
@guarded
def inspect(model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file."),
            format: str = typer.Option("table", "--format", help="table, csv or json.")):
    """What a model was trained on, its settings and its metrics.

    Example: hybrid inspect club.hybrid
    """
    check_format(format)
    model = HybridFactorModel.load(model_file)
    use_nouns(settings_for(model, None))
    info = _summary(model)
    params = model.get_params()
    info.update({f"setting {k}": v for k, v in params.items() if k != "schema"})
    info["attribute columns"] = ", ".join(f"{c} ({s['type']})" for c, s in model.features_.spec().items())
    info["validation RMSE of the last epochs (before the final steps)"] = ", ".join(
        f"{r['valid_rmse']:.4f}" for r in model.history_[-3:] if r["valid_rmse"] == r["valid_rmse"])
    emit_mapping(info, format, f"model {model_file}")


@app.command(cls=Command)
@guarded
def demo(folder: Path = typer.Argument(Path("demo-out"), help="Folder for the demo's files."),
         seed: int = typer.Option(7, "--seed", help="Seed of the invented tasting club.")):
    """Run the tasting-club demo end to end and tell what it found.

    Writes invented sample files, trains, scores the new lots, plans a sampling
    campaign and writes a report, all inside FOLDER.

    Example: hybrid demo demo-out
    """
    from hybrid.app.demo import run_demo
    from hybrid.datasets.club import DEMO_CONFIG
    use_nouns(load_config(DEMO_CONFIG))   # the club's words: lots and members
    with CountProgress(None, "running the demo"):   # its story prints above the spinner
        run_demo(folder, seed=seed, say=say)


from hybrid.cli.plan import (  # noqa: E402
    calibrate_command,
    plan_command,
    report_command,
    update_command,
)

app.command("plan", cls=Command)(guarded(plan_command))
app.command("update", cls=Command)(guarded(update_command))
app.command("calibrate", cls=Command)(guarded(calibrate_command))
app.command("report", cls=Command)(guarded(report_command))

from hybrid.cli.campaign import campaign_app  # noqa: E402
from hybrid.cli.evaluate import evaluate_command, tune_command  # noqa: E402

app.add_typer(campaign_app, name="campaign")

app.command("evaluate", cls=Command)(guarded(evaluate_command))
app.command("tune", cls=Command)(guarded(tune_command))


@app.command(cls=Command)
def version():
    """Print the version."""
    say(__version__)


def main():  # the console script
    app()
