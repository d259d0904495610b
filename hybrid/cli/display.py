"""Terminal output: tables (rich) on a terminal, CSV or JSON when asked, progress on stderr."""
from __future__ import annotations

import contextlib
import functools
import io
import json
import os
import shutil
import sys
import textwrap
import warnings

import numpy as np
import pandas as pd
import typer
from rich.console import Console
from rich.table import Table
from sklearn.exceptions import ConvergenceWarning
from typer.core import TyperArgument, TyperCommand

from hybrid.app.nouns import GENERIC, nouns_of, speak
from hybrid.common.errors import InputError
from hybrid.common.limits import SETTINGS
from hybrid.estimator.oddities import OddInputWarning

FORMATS = ("table", "csv", "json")

class Command(TyperCommand):
    """A command whose help reads as people write it: arguments in capitals without braces in
    the usage line (``hybrid score [OPTIONS] MODEL NEW_ITEMS``), and its whole first sentence in
    the list of commands rather than one cut at a width."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        for param in self.params:
            if isinstance(param, TyperArgument) and param.metavar is None:
                param.metavar = param.name.upper()

    def collect_usage_pieces(self, ctx):
        pieces = [self.options_metavar] if self.options_metavar else []
        for param in self.get_params(ctx):
            if isinstance(param, TyperArgument):
                pieces.append(param.metavar if param.required else f"[{param.metavar}]")
        return pieces

    def get_help(self, ctx) -> str:
        """The help, in the catalogue's words when a settings file is given on the same line
        (``hybrid plan --config coffee.toml --help`` speaks of lots and members)."""
        text = super().get_help(ctx)
        args = sys.argv[1:] if ctx.parent is not None else []
        given = [args[j + 1] for j, a in enumerate(args[:-1]) if a == "--config"]
        given += [a.split("=", 1)[1] for a in args if a.startswith("--config=")]
        if given:
            from hybrid.app.config import load_config
            try:
                return speak(text, nouns_of(load_config(given[-1])))
            except InputError:   # a settings file that does not load: the command will say so
                return text
        return text

    def get_short_help_str(self, limit: int = 45) -> str:
        first = (self.help or "").strip().split("\n\n")[0]
        return " ".join(first.split())


# the catalogue's nouns for this command's screens (``[display]``): set by each command once its
# settings are known, reset to the generic ones when a command starts
_NOUNS = dict(GENERIC)


def use_nouns(cfg) -> None:
    """Speak the catalogue's words (``[display] item``, ``user``) on this command's screens."""
    _NOUNS.clear()
    _NOUNS.update(nouns_of(cfg))


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
        warnings.filterwarnings("always", category=OddInputWarning)   # every run says what looks odd
        warnings.showwarning = lambda message, category, *rest, **kw: note(str(message))
        yield


def guarded(fn):
    """Turn bad input into one clear line on stderr and exit code 2 (no traceback)."""
    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        use_nouns(None)
        try:
            with _notes():
                return fn(*args, **kwargs)
        except InputError as exc:
            fail(str(exc))
        except BrokenPipeError:
            # the reader of our output went away (``| head``): the files were written before
            # the screen, so nothing is lost; stop without a word (and without Python's own
            # complaint when it flushes the closed pipe at exit)
            with contextlib.suppress(OSError, ValueError):
                os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
            raise SystemExit(0) from None
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
    print(f"note: {speak(text, _NOUNS)}", file=sys.stderr)


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


def decimals(values) -> int:
    """Decimals for a column of numbers: none for whole numbers, else four significant digits of
    the largest (at most four decimals), the same for every row.

    >>> decimals([1.0, 12.0]), decimals([0.9797, 1.117]), decimals([3.61, 4.2]), decimals([722.5, 12345.6])
    (0, 3, 3, 0)
    """
    x = np.asarray([v for v in values if v is not None and np.isfinite(v)], dtype=float)
    if not x.size or np.array_equal(x, np.round(x)):
        return 0
    top = float(np.abs(x).max())
    return int(np.clip(3 - np.floor(np.log10(top)) if top > 0 else 4, 0, 4))


def for_people(df: pd.DataFrame) -> pd.DataFrame:
    """A table's cells as people read them: ``X_mean`` and ``X_sd`` as one ``mean ± sd`` cell,
    numbers with one count of decimals per column, yes/no for flags, headers in words."""
    out = {}
    done = set()
    for col in df.columns:
        if col in done:
            continue
        values = df[col]
        base = str(col)[:-5] if str(col).endswith("_mean") else None
        if base is not None and f"{base}_sd" in df.columns and pd.api.types.is_numeric_dtype(values):
            sd = df[f"{base}_sd"]
            d = decimals(list(values) + list(sd))
            out[_words(base)] = [("" if pd.isna(m) else f"{m:,.{d}f}" + ("" if pd.isna(e) else f" ± {e:,.{d}f}"))
                                 for m, e in zip(values, sd)]
            done.add(f"{base}_sd")
        elif pd.api.types.is_bool_dtype(values):
            out[_words(col)] = ["yes" if v else "no" for v in values]
        elif pd.api.types.is_numeric_dtype(values):
            d = decimals(values.astype(float))
            out[_words(col)] = ["" if pd.isna(v) else f"{v:,.{d}f}" for v in values]
        else:
            out[_words(col)] = [_cell(v) for v in values]
    return pd.DataFrame(out)


_UPPER = {"rmse": "RMSE", "mae": "MAE", "ndcg10": "NDCG@10", "id": "id"}
_NAMED = {"lam_user": "user penalty", "lam_item": "item penalty", "lam_map": "map penalty"}


def _words(name) -> str:
    """A field name as words for a heading: ``valid_rmse`` -> ``valid RMSE``."""
    if str(name) in _NAMED:
        return _NAMED[str(name)]
    return " ".join(_UPPER.get(w.lower(), w) for w in str(name).replace("_", " ").split())


def _is_number(text: str) -> bool:
    return bool(text) and text.replace(",", "").replace(".", "").replace("-", "").replace(" ± ", "").isdigit()


def _least_width(cells: pd.Series, heading: str, numeric: bool) -> int:
    """A number column's widest cell; a text column's longest word, up to 12 (longer ones fold);
    neither narrower than the longest word of its heading."""
    words = [len(w) for w in heading.split()] or [1]
    if numeric:
        return max(max(len(v) for v in cells), *words)
    return max(min(12, max((len(w) for v in cells for w in str(v).split()), default=1)), min(12, max(words)))


def _width(table: Table, width: int) -> int:
    """The widest line of ``table`` laid out for a terminal ``width`` wide, uncropped."""
    probe = Console(width=width, file=io.StringIO(), soft_wrap=True, color_system=None)
    probe.print(table)
    return max((len(line) for line in probe.file.getvalue().splitlines()), default=0)


def _table(shown: pd.DataFrame, columns: dict, title) -> Table:
    """Number columns never wrap nor shrink below their widest cell; text columns fold."""
    table = Table(title=title, title_justify="left", header_style="bold")
    for col, (numeric, least) in columns.items():
        table.add_column(col, justify="right" if numeric else "left", no_wrap=numeric, min_width=least,
                         overflow="ellipsis" if numeric else "fold")
    for row in shown.itertuples(index=False):
        table.add_row(*row)
    return table


def emit(df: pd.DataFrame, fmt: str = "table", title: str | None = None) -> None:
    """Write a table to stdout in the chosen format: field names and full precision for machines
    (``csv``, ``json``); for people a table whose numbers are never cut (on a narrow terminal text
    columns wrap first, then the last columns are left out, with a note)."""
    if fmt == "csv":
        df.to_csv(sys.stdout, index=False)
        return
    if fmt == "json":
        sys.stdout.write(df.to_json(orient="records", double_precision=10) + "\n")
        return
    shown = for_people(df)
    shown.columns = [speak(c, _NOUNS) for c in shown.columns]   # headings in the catalogue's words
    title = None if title is None else speak(title, _NOUNS)
    console = Console(soft_wrap=False)
    numeric = {c: all(_is_number(v) or v == "" for v in shown[c]) and any(shown[c]) for c in shown.columns}
    least = {c: _least_width(shown[c], c, numeric[c]) for c in shown.columns}
    keep = list(shown.columns)
    while True:   # leave out the last columns until the table, laid out, fits the terminal
        columns = {c: (numeric[c], least[c]) for c in keep}
        if len(keep) == 1 or _width(_table(shown[keep], columns, None), console.width) <= console.width:
            break
        keep.pop()
    table = _table(shown[keep], columns, title)
    console.print(table)
    left = [c for c in shown.columns if c not in keep]
    if left:
        note(f"{len(left)} column(s) left out to fit {console.width} columns: {', '.join(left)} "
             "(a wider terminal or --format csv shows them)")


def emit_mapping(values: dict, fmt: str, title: str) -> None:
    """A two-column table of a flat mapping; JSON keeps the mapping as is."""
    if fmt == "json":
        sys.stdout.write(json.dumps(values, default=str, indent=2) + "\n")
        return
    if fmt != "table":
        emit(pd.DataFrame({"what": list(values), "value": [_cell(v) for v in values.values()]}), fmt, title)
        return
    emit(pd.DataFrame({"what": [speak(k, _NOUNS) for k in values],
                       "value": [speak(v, _NOUNS) if isinstance(v, str) else _cell(v) for v in values.values()]}),
         fmt, title)


def say(text: str = "") -> None:
    """A line of text for people on stdout, wrapped to the terminal (a line that starts with
    spaces keeps them on every wrapped line)."""
    width = shutil.get_terminal_size((80, 24)).columns
    text = speak(text, _NOUNS)
    indent = text[:len(text) - len(text.lstrip(" "))]
    typer.echo(textwrap.fill(text, width=max(width, 40), subsequent_indent=indent + "  " if indent else "",
                             break_long_words=False, break_on_hyphens=False) if text else "")


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
    """Progress on stderr, shown only when stderr is a terminal (silent when piped or with
    ``--quiet``): a bar over a count (items scored, folds evaluated), or with ``total=None`` a
    spinner and the time so far for work that has no count.  ``steps`` below 2 shows nothing
    (a file of one chunk is done before a bar means anything)."""

    def __init__(self, total: int | None, label: str, steps: int = 2, quiet: bool = False):
        self.enabled = not quiet and steps > 1 and sys.stderr.isatty()
        self.total, self.label, self.progress = total, label, None

    def __enter__(self):
        if self.enabled:
            from rich.progress import (
                BarColumn,
                MofNCompleteColumn,
                Progress,
                SpinnerColumn,
                TextColumn,
                TimeElapsedColumn,
            )
            counted = [BarColumn(), MofNCompleteColumn()] if self.total is not None else []
            self.progress = Progress(SpinnerColumn(), TextColumn(self.label), *counted,
                                     TextColumn("{task.description}"), TimeElapsedColumn(),
                                     console=Console(stderr=True), transient=True)
            self.progress.__enter__()
            self.task = self.progress.add_task("", total=self.total)
        return self

    def step(self, done: int, total: int, what: str = "") -> None:
        """A library callback's report: ``done`` of ``total`` steps, the one now under way."""
        if self.progress is not None:
            self.progress.update(self.task, completed=done, total=total, description=what)

    def advance(self, n: int) -> None:
        if self.progress is not None:
            self.progress.update(self.task, advance=n)

    def __exit__(self, *exc):
        if self.progress is not None:
            self.progress.__exit__(*exc)
        return False
