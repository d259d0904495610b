"""Read and validate the rating table and the item attribute table.

Every problem is an :class:`~hybrid.common.errors.InputError` naming the file, the
row (for CSV, the line of the file: the header is line 1), the column, what
was expected and what was found.  Ids are kept as strings throughout: an id
``"007"`` is not the number 7.
"""
from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd

from hybrid.common.errors import InputError, did_you_mean_id
from hybrid.io.database import Source, is_database, read_database_table

_SNIFF = (";", "\t", "|", ",")


def _decode(raw: bytes, source: str, delimiter: str) -> str:
    try:
        return raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line_no = raw[: exc.start].count(b"\n") + 1
        line_start = raw.rfind(b"\n", 0, exc.start) + 1
        field = raw[line_start: exc.start].count(delimiter.encode()) + 1
        header = raw.split(b"\n", 1)[0].decode("utf-8", "replace").strip().split(delimiter)
        column = header[field - 1] if field <= len(header) else f"#{field}"
        if not column.isprintable() or len(column) > 40:   # a binary file's "header" is noise
            column = f"#{field}"
        raise InputError(
            f"expected UTF-8 text, found undecodable byte 0x{raw[exc.start]:02x}",
            file=source, row=line_no, column=column) from None


def read_table(path: str | Path, required: list[str], *, delimiter: str = ",",
               text_columns: list[str] = ()) -> pd.DataFrame:
    """Read a CSV or Parquet table, or a database table or query, with every column as text.

    Parameters
    ----------
    path : str or Path
        ``.parquet`` / ``.pq`` files are read as Parquet, a database URL with a table or a
        query after ``#`` from the database (:mod:`hybrid.io.database`), anything else as CSV.
    required : list of str
        Columns that must be present.
    delimiter : str
        CSV field separator.
    text_columns : list of str
        Id columns; in Parquet they must hold text or whole numbers.

    Examples
    --------
    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "r.csv")
    >>> _ = open(p, "w").write("user,item,rating\\nu1,i1,4\\n")
    >>> read_table(p, ["user", "item", "rating"]).iloc[0].tolist()
    ['u1', 'i1', '4']
    """
    if is_database(path):
        df, source = read_database_table(str(path))
        df = _as_text(df, source, text_columns)
        delimiter = ","
    else:
        df, source = _read_file(Path(path), delimiter, text_columns), str(path)
    df.columns = [str(c) for c in df.columns]
    _check_columns(df, required, source, delimiter)
    if len(df) == 0:
        raise InputError("the file has a header but no rows" if not is_database(path) else "no rows", file=source)
    return df


def first_row(path) -> int:
    """The number of a table's first row in errors: a CSV file's line (the header is line 1),
    else 1 (Parquet, a database table or query)."""
    if is_database(path):
        return 1
    return 1 if Path(path).suffix.lower() in (".parquet", ".pq") else 2


def source_name(path) -> str:
    """How errors name a table: its path, or a database's URL (password hidden) and table."""
    return Source.parse(str(path)).shown if is_database(path) else str(path)


def _read_file(path: Path, delimiter: str, text_columns) -> pd.DataFrame:
    source = str(path)
    if not path.is_file():
        raise InputError("file not found", file=source)
    if path.suffix.lower() in (".parquet", ".pq"):
        return _read_parquet(path, text_columns)
    raw = path.read_bytes()
    if not raw.strip():
        raise InputError("the file is empty; expected a header line and rows", file=source)
    text = _decode(raw, source, delimiter)
    try:
        return pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False, sep=delimiter, engine="c")
    except pd.errors.ParserError as exc:
        raise InputError(f"not a well-formed {delimiter!r}-separated table: {exc}".splitlines()[0],
                         file=source) from None


def _read_parquet(path: Path, text_columns) -> pd.DataFrame:
    try:
        df = pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises several unrelated types
        raise InputError(f"not a readable Parquet file ({type(exc).__name__})", file=str(path)) from None
    return _as_text(df, str(path), text_columns)


def _as_text(df: pd.DataFrame, source: str, text_columns) -> pd.DataFrame:
    """Typed columns (Parquet's, a database's) as the text a CSV file's cells would be; ids
    must be text or whole numbers."""
    for col in df.columns:
        if col in text_columns:
            df[col] = id_strings(df[col], source, col)
        elif df[col].dtype != object:
            df[col] = df[col].astype(str).where(df[col].notna(), "")
        else:
            df[col] = df[col].fillna("").astype(str)
    return df


def id_strings(values: pd.Series, source: str, column: str, row_base: int = 1) -> pd.Series:
    """Turn an id column into strings, refusing decimals and mixed types."""
    if pd.api.types.is_float_dtype(values):
        arr = values.to_numpy()
        fractional = np.flatnonzero(arr != np.round(arr))
        bad = int(fractional[0]) if fractional.size else 0
        raise InputError(f"expected ids as text or whole numbers, found decimal number {arr[bad]:g}",
                         file=source, row=bad + row_base, column=column)
    if values.dtype == object:
        kinds = values.map(lambda v: type(v).__name__)
        if kinds.nunique() > 1:
            first = kinds.iloc[0]
            bad = int(np.flatnonzero((kinds != first).to_numpy())[0])
            raise InputError(f"expected ids of one type, found mixed types ({first} and {kinds.iloc[bad]})",
                             file=source, row=bad + row_base, column=column)
    return values.astype(str)


def _check_columns(df: pd.DataFrame, required, source: str, delimiter: str) -> None:
    missing = [c for c in required if c not in df.columns]
    if not missing:
        return
    header = list(df.columns)
    if len(header) == 1:
        for sep in _SNIFF:
            if sep != delimiter and sep in header[0]:
                raise InputError(f"expected {delimiter!r}-separated columns, the header looks "
                                 f"{sep!r}-separated: {header[0]!r}", file=source)
    if all(_looks_like_value(h) for h in header):
        raise InputError(f"no header line: the first line holds values {header[:4]}; expected "
                         f"column names {', '.join(required)}", file=source)
    raise InputError(f"missing column '{missing[0]}'; found columns {', '.join(header)}",
                     file=source, column=missing[0])


def _looks_like_value(name: str) -> bool:
    try:
        float(name)
        return True
    except ValueError:
        return name.strip() == "" or name.startswith("Unnamed:")


def check_ids(values: pd.Series, source: str, column: str, row_base: int) -> None:
    """Refuse empty ids and ids with surrounding white space."""
    stripped = values.str.strip()
    bad = (stripped != values) | (values == "")
    if bad.any():
        pos = int(np.flatnonzero(bad.to_numpy())[0])
        found = values.iloc[pos]
        what = "an empty id" if found == "" else f"{found!r} with surrounding spaces"
        raise InputError(f"expected an id, found {what}", file=source, row=pos + row_base, column=column)


def parse_numbers(values: pd.Series, source: str, column: str, row_base: int,
                  allow_missing: bool) -> np.ndarray:
    """Convert text to floats; name the first cell that is not a number."""
    numeric = pd.api.types.is_numeric_dtype(values)
    num = values if numeric else pd.to_numeric(values.astype(str).str.strip(), errors="coerce")
    arr = num.to_numpy(dtype=float, na_value=np.nan)
    bad = ~np.isfinite(arr)
    if allow_missing:
        bad &= ~np.isnan(arr) if numeric else values.astype(str).str.strip().to_numpy() != ""
    if bad.any():
        pos = int(np.flatnonzero(bad)[0])
        raise InputError(f"expected a number, found {values.iloc[pos]!r}", file=source,
                         row=pos + row_base, column=column)
    return arr


def validate_ratings(df: pd.DataFrame, cols: dict, *, scale=(1.0, 5.0), duplicates: str = "error",
                     source: str = "ratings", row_base: int = 1) -> pd.DataFrame:
    """Check a raw ratings table and return columns ``user``, ``item``, ``rating``.

    Parameters
    ----------
    df : DataFrame
        Raw table; ``cols`` maps ``user``/``item``/``rating``/``timestamp``
        to its column names (``timestamp`` may be empty).
    scale : (low, high)
        Ratings outside are an error.
    duplicates : {'error', 'last'}
        A repeated (user, item) pair is an error, or the last one is kept.

    Examples
    --------
    >>> raw = pd.DataFrame({"m": ["a", "b"], "l": ["x", "x"], "s": ["4", "2.5"]})
    >>> validate_ratings(raw, {"user": "m", "item": "l", "rating": "s"})["rating"].tolist()
    [4.0, 2.5]
    """
    for key in ("user", "item", "rating"):
        if cols[key] not in df.columns:
            raise InputError(f"missing column '{cols[key]}'", file=source, column=cols[key])
    out = pd.DataFrame({"user": id_strings(df[cols["user"]], source, cols["user"], row_base),
                        "item": id_strings(df[cols["item"]], source, cols["item"], row_base)})
    check_ids(out["user"], source, cols["user"], row_base)
    check_ids(out["item"], source, cols["item"], row_base)
    raw_rating = df[cols["rating"]]
    rating = parse_numbers(raw_rating.astype(str) if raw_rating.dtype == object else raw_rating,
                           source, cols["rating"], row_base, allow_missing=False)
    low, high = scale
    outside = (rating < low) | (rating > high)
    if outside.any():
        pos = int(np.flatnonzero(outside)[0])
        raise InputError(f"expected a rating between {low:g} and {high:g}, found {rating[pos]:g}",
                         file=source, row=pos + row_base, column=cols["rating"])
    out["rating"] = rating
    if cols.get("timestamp"):
        if cols["timestamp"] not in df.columns:
            raise InputError(f"missing column '{cols['timestamp']}'", file=source, column=cols["timestamp"])
        out["timestamp"] = df[cols["timestamp"]].to_numpy()
    dup = out.duplicated(["user", "item"], keep="first")
    if dup.any():
        if duplicates == "error":
            pos = int(np.flatnonzero(dup.to_numpy())[0])
            raise InputError(f"expected one rating per (user, item), found a second for "
                             f"({out['user'].iloc[pos]!r}, {out['item'].iloc[pos]!r}); set "
                             "ratings.duplicates = 'last' to keep the last", file=source, row=pos + row_base)
        out = out.drop_duplicates(["user", "item"], keep="last")
    return out.reset_index(drop=True)


def read_ratings(path: str | Path, cfg: dict) -> pd.DataFrame:
    """Read and validate a ratings file according to the ``[ratings]`` settings."""
    r = cfg["ratings"]
    required = [r["user"], r["item"], r["rating"]] + ([r["timestamp"]] if r["timestamp"] else [])
    df = read_table(path, required, delimiter=r["delimiter"], text_columns=[r["user"], r["item"]])
    row_base, source = first_row(path), source_name(path)
    return validate_ratings(df, r, scale=tuple(r["scale"]), duplicates=r["duplicates"],
                            source=source, row_base=row_base)


def validate_attributes(df: pd.DataFrame, id_column: str | None, schema: dict, *,
                        source: str = "attributes", row_base: int = 1,
                        require_all: bool = True) -> pd.DataFrame:
    """Index an attribute table by item id and check its declared columns.

    ``require_all=False`` (for new items at scoring time) accepts a table
    that lacks some declared columns, provided it has at least one.
    """
    if id_column is not None:
        if id_column not in df.columns:
            raise InputError(f"missing id column '{id_column}'; found columns {', '.join(df.columns)}",
                             file=source, column=id_column)
        ids = id_strings(df[id_column], source, id_column, row_base)
        check_ids(ids, source, id_column, row_base)
        df = df.drop(columns=[id_column]).set_axis(pd.Index(ids, name="item"), axis=0)
    else:
        df = df.set_axis(pd.Index(df.index.astype(str), name="item"), axis=0)
    dup = df.index.duplicated()
    if dup.any():
        pos = int(np.flatnonzero(dup)[0])
        raise InputError(f"expected one row per item, found '{df.index[pos]}' again",
                         file=source, row=pos + row_base, column=id_column)
    used = [c for c, spec in schema.items() if spec["type"] != "ignore"]
    absent = [c for c in used if c not in df.columns]
    if require_all and absent:
        raise InputError(f"column '{absent[0]}' is declared as {schema[absent[0]]['type']} but is not "
                         f"in the file; found columns {', '.join(df.columns)}", file=source, column=absent[0])
    if not require_all and len(absent) == len(used):
        raise InputError(f"none of the model's attribute columns ({', '.join(used)}) is in the file; "
                         f"found columns {', '.join(df.columns)}", file=source)
    for col in used:
        if col in df.columns and schema[col]["type"] == "number":
            values = df[col]
            if not pd.api.types.is_numeric_dtype(values):
                values = values.astype(object).where(values.notna(), "").astype(str)
            parse_numbers(values, source, col, row_base, allow_missing=True)
    return df


def read_attributes(path: str | Path, cfg: dict, schema: dict, *, require_all: bool = True) -> pd.DataFrame:
    """Read an item attribute file according to the ``[attributes]`` settings."""
    a = cfg["attributes"]
    df = read_table(path, [a["id"]], delimiter=a["delimiter"], text_columns=[a["id"]])
    row_base, source = first_row(path), source_name(path)
    return validate_attributes(df, a["id"], schema, source=source, row_base=row_base,
                               require_all=require_all)


def read_item_list(path: str | Path, cfg: dict, known) -> list:
    """The item ids in a table's item column (the ``[attributes]`` id), each known to the model."""
    a = cfg["attributes"]
    df = read_table(path, [a["id"]], delimiter=a["delimiter"], text_columns=[a["id"]])
    row_base, source = first_row(path), source_name(path)
    ids = id_strings(df[a["id"]], source, a["id"], row_base)
    unknown = np.flatnonzero(~ids.isin(known).to_numpy())
    if unknown.size:
        first = ids.iloc[unknown[0]]
        raise InputError(f"item '{first}' is not in the model{did_you_mean_id(first, known)}"
                         " (new items need --new-items)",
                         file=source, row=int(unknown[0]) + row_base, column=a["id"])
    return ids.tolist()


def read_training_tables(ratings, attributes, cfg: dict, schema: dict) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The ratings and the attribute table a fit reads (files or database tables), every rated
    item described (``train``, ``calibrate``, ``evaluate``, ``tune`` and the demo)."""
    table = read_ratings(ratings, cfg)
    attrs = read_attributes(attributes, cfg, schema)
    check_items_described(table, attrs, source=source_name(ratings), row_base=first_row(ratings))
    return table, attrs


def check_items_described(ratings: pd.DataFrame, attributes: pd.DataFrame,
                          source: str = "ratings", row_base: int = 1) -> None:
    """Every rated item must have an attribute row."""
    known = ratings["item"].isin(attributes.index).to_numpy()
    if not known.all():
        pos = int(np.flatnonzero(~known)[0])
        item = ratings["item"].iloc[pos]
        hint = ""
        twin = [a for a in attributes.index if _same_number(a, item)]
        if twin:
            hint = f" (the attribute table has '{twin[0]}': ids are compared as text)"
        raise InputError(f"item '{item}' is rated but has no row in the attribute table{hint}",
                         file=source, row=pos + row_base)


def _same_number(a: str, b: str) -> bool:
    try:
        return float(a) == float(b)
    except ValueError:
        return False


def read_plan(path: Path) -> pd.DataFrame:
    """A plan written by `hybrid plan` (CSV, JSON, JSON Lines or Parquet)."""
    if not path.is_file():
        raise InputError("plan file not found", file=str(path))
    suffix = path.suffix.lower()
    try:
        if suffix == ".json":
            df = pd.read_json(path, orient="records", dtype={"item": str, "model_fingerprint": str})
        elif suffix in (".jsonl", ".ndjson"):
            df = pd.read_json(path, orient="records", lines=True, dtype={"item": str, "model_fingerprint": str})
        elif suffix == ".parquet":
            df = pd.read_parquet(path).astype({"item": str}, errors="ignore")
        else:
            df = pd.read_csv(path, dtype={"item": str, "model_fingerprint": str})
    except (ValueError, OSError) as exc:
        raise InputError(f"not a readable plan ({str(exc).splitlines()[0]})", file=str(path)) from None
    missing = [c for c in ("item", "status", "ratings", "needed") if c not in df.columns]
    if missing:
        raise InputError(f"not a plan: missing column '{missing[0]}'", file=str(path), column=missing[0])
    return df
