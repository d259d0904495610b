"""Commands for checking the model before trusting it: evaluate, tune (registered in :mod:`hybrid.cli`)."""
from __future__ import annotations

import copy
from pathlib import Path
from typing import Optional

import typer

from hybrid.app.config import load_config, model_params
from hybrid.cli.display import TABLE_HELP, CountProgress, check_format, emit, say, use_nouns
from hybrid.common.errors import InputError
from hybrid.io.outputs import atomic_path, check_output
from hybrid.io.tables import read_training_tables


def _inputs(ratings, attributes, config):
    cfg = load_config(config)
    use_nouns(cfg)
    params = model_params(cfg)
    table, attrs = read_training_tables(ratings, attributes, cfg, params["schema"])
    return cfg, params, table, attrs


def evaluate_command(
        ratings: str = typer.Argument(..., help="Ratings table" + TABLE_HELP),
        attributes: str = typer.Argument(..., help="Item attribute table" + TABLE_HELP),
        config: Optional[Path] = typer.Option(None, "--config", help="TOML settings file."),
        protocol: str = typer.Option("cold", "--protocol", help="cold, warm or few."),
        folds: int = typer.Option(5, "--folds", help="Folds (mean and standard deviation are reported)."),
        seed: int = typer.Option(0, "--seed", help="Seed of the folds."),
        min_ratings: int = typer.Option(5, "--min-ratings", help="cold/few: held-out items have at least this many ratings."),
        quiet: bool = typer.Option(False, "--quiet", help="No progress display."),
        format: str = typer.Option("table", "--format", help="table, csv or json.")):
    """Compare the hybrid with baselines (each tuned on its own) on held-out ratings.

    Example: hybrid evaluate ratings.csv lots.csv --config coffee.toml --protocol cold --folds 3
    """
    from hybrid.evaluation.evaluate import PROTOCOLS, evaluate

    check_format(format)
    if protocol not in PROTOCOLS:
        raise InputError(f"--protocol must be one of {', '.join(PROTOCOLS)}, found {protocol!r}")
    _, params, table, attrs = _inputs(ratings, attributes, config)
    with CountProgress(folds, "evaluating", quiet=quiet) as bar:
        result = evaluate(table, attrs, params, protocol=protocol, folds=folds, seed=seed, min_ratings=min_ratings,
                          on_step=bar.step)
    emit(result.round(4), format, f"{protocol} protocol, {folds} folds (mean and sd)")


def tune_command(
        ratings: str = typer.Argument(..., help="Ratings table" + TABLE_HELP),
        attributes: str = typer.Argument(..., help="Item attribute table" + TABLE_HELP),
        out: Path = typer.Option(..., "--out", help="Config file to write with the best settings."),
        config: Optional[Path] = typer.Option(None, "--config", help="TOML settings file."),
        trials: int = typer.Option(30, "--trials", help="Random settings to try."),
        seed: int = typer.Option(0, "--seed", help="Seed of the search."),
        format: str = typer.Option("table", "--format", help="table, csv or json.")):
    """Random search over rank and the three regularisation weights on the cold-start protocol.

    Writes the settings file with the best values, ready for `hybrid train --config`.

    Example: hybrid tune ratings.csv lots.csv --config coffee.toml --trials 5 --out best.toml
    """
    import sys

    import tomli_w

    from hybrid.evaluation.tune import tune

    check_format(format)
    check_output(out, "settings")
    cfg, params, table, attrs = _inputs(ratings, attributes, config)

    def progress(row):
        if sys.stderr.isatty():
            typer.echo(f"trial {row['trial']}/{trials}: validation RMSE {row['valid_rmse']:.4f}", err=True)

    trials_table, best, test_rmse = tune(table, attrs, params, trials=trials, seed=seed, on_trial=progress)
    new = copy.deepcopy(cfg)
    new["model"].update(best)
    with atomic_path(out) as tmp:
        tmp.write_text("# written by hybrid tune: the best of %d trials on the cold-start protocol\n" % trials
                       + tomli_w.dumps(new), encoding="utf-8")
    emit(trials_table.sort_values("valid_rmse").head(10).round(4), format, "the best trials")
    if format == "table":
        say(f"best settings written to {out}; their RMSE on the untouched test items: {test_rmse:.4f}")
