"""Terminal output: tables (rich) on a terminal, CSV or JSON when asked, progress on stderr."""
from __future__ import annotations

import contextlib
import functools
import json
import sys
import warnings

import numpy as np
import pandas as pd
import typer
from rich.console import Console
from rich.table import Table
from sklearn.exceptions import ConvergenceWarning

from hybrid.common.errors import InputError
from hybrid.common.limits import SETTINGS

FORMATS = ("table", "csv", "json")

# what a table argument may be (files by ending; a database by URL, hybrid.io.database)
TABLE_HELP = ": CSV, Parquet, or a database table or query (sqlite:///club.db#ratings)."


def setting_help(section: str, name: str) -> str:
    """A flag's help: the setting's own help from the one table, what it allows, and where its
    default comes from."""
    setting = SETTINGS[section][name]
    default = ("" if setting.default is None else
               f"; default: the settings' [{section}] {name}, {setting.default!r} unless changed")
    text = setting.help.replace("\n", " ")
    return f"{text[0].upper()}{text[1:]} ({setting.allowed}{default})."


ENGINE_HELP = "Where to run: local (this process) or dask (a cluster; needs the dask extra)."
ADDRESS_HELP = "Dask scheduler address, e.g. tcp://10.0.0.5:8786 (default: start a local cluster)."
PARTITIONS_HELP = "Blocks per side of the rating matrix on the cluster."


def fail(message: str, code: int = 2):
    """Print one line on stderr and exit."""
    typer.echo(f"hybrid: error: {message}", err=True)
    raise typer.Exit(code)


@contextlib.contextmanager
def _notes():
    """Warnings (a fit that used all its epochs, say) as one line each on stderr, not Python's
    two-line form with a source path."""
    with warnings.catch_warnings():
        warnings.filterwarnings("always", category=ConvergenceWarning)
        warnings.showwarning = lambda message, category, *rest, **kw: note(str(message))
        yield


def guarded(fn):
    """Turn bad input into one clear line on stderr and exit code 2 (no traceback)."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            with _notes():
                return fn(*args, **kwargs)
        except InputError as exc:
            fail(str(exc))
        except (FileNotFoundError, PermissionError, IsADirectoryError) as exc:
            fail(f"{exc.filename}: {exc.strerror.lower()}")
        except OSError as exc:   # a full disk, a quota, a device gone: the output was not replaced
            where = f"{exc.filename}: " if exc.filename else ""
            fail(f"{where}{(exc.strerror or str(exc)).lower()}; nothing was written")
        except KeyboardInterrupt:
            fail("interrupted; nothing was written", 130)
    return wrapper


def note(text: str) -> None:
    """One line on stderr about something the user should know (not an error)."""
    print(f"note: {text}", file=sys.stderr)


def check_format(fmt: str) -> str:
    if fmt not in FORMATS:
        raise InputError(f"--format must be one of {', '.join(FORMATS)}, found {fmt!r}")
    return fmt


def _cell(v) -> str:
    if isinstance(v, (float, np.floating)):
        return "" if np.isnan(v) else f"{v:,.4g}" if abs(v) < 1e5 else f"{v:,.0f}"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    return str(v)


def emit(df: pd.DataFrame, fmt: str = "table", title: str | None = None) -> None:
    """Write a table to stdout in the chosen format."""
    if fmt == "csv":
        df.to_csv(sys.stdout, index=False)
    elif fmt == "json":
        sys.stdout.write(df.to_json(orient="records", double_precision=10) + "\n")
    else:
        table = Table(title=title, title_justify="left", header_style="bold")
        for col in df.columns:
            table.add_column(str(col), justify="right" if pd.api.types.is_numeric_dtype(df[col]) else "left")
        for row in df.itertuples(index=False):
            table.add_row(*[_cell(v) for v in row])
        Console(soft_wrap=False).print(table)


def emit_mapping(values: dict, fmt: str, title: str) -> None:
    """A two-column table of a flat mapping; JSON keeps the mapping as is."""
    if fmt == "json":
        sys.stdout.write(json.dumps(values, default=str, indent=2) + "\n")
        return
    emit(pd.DataFrame({"what": list(values), "value": [_cell(v) for v in values.values()]}), fmt, title)


def say(text: str = "") -> None:
    """A line of the demo's story on stdout."""
    typer.echo(text)


class EpochProgress:
    """A progress bar for training, shown only when stderr is a terminal."""

    def __init__(self, epochs: int, quiet: bool = False):
        self.enabled = not quiet and sys.stderr.isatty()
        self.epochs = epochs
        self.progress = None

    def __enter__(self):
        if self.enabled:
            from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
            self.progress = Progress(TextColumn("epoch {task.completed}/{task.total}"), BarColumn(),
                                     TextColumn("{task.description}"), TimeElapsedColumn(),
                                     console=Console(stderr=True), transient=True)
            self.progress.__enter__()
            self.task = self.progress.add_task("", total=self.epochs)
        return self

    def __call__(self, record: dict) -> None:
        if self.progress is not None:
            valid = record["valid_rmse"]
            text = f"objective {record['objective']:,.1f}" + ("" if np.isnan(valid) else f"  valid RMSE {valid:.4f}")
            self.progress.update(self.task, completed=record["epoch"], description=text)

    def __exit__(self, *exc):
        if self.progress is not None:
            self.progress.__exit__(*exc)
        return False


class CountProgress:
    """A progress bar over a count (items scored, say), shown only when stderr is a terminal
    and there is more than one step: silent when piped or with ``--quiet``."""

    def __init__(self, total: int, label: str, steps: int = 2, quiet: bool = False):
        self.enabled = not quiet and steps > 1 and sys.stderr.isatty()
        self.total, self.label, self.progress = total, label, None

    def __enter__(self):
        if self.enabled:
            from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
            self.progress = Progress(TextColumn(self.label), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                                     console=Console(stderr=True), transient=True)
            self.progress.__enter__()
            self.task = self.progress.add_task("", total=self.total)
        return self

    def advance(self, n: int) -> None:
        if self.progress is not None:
            self.progress.update(self.task, advance=n)

    def __exit__(self, *exc):
        if self.progress is not None:
            self.progress.__exit__(*exc)
        return False
