"""A campaign's ledger: one SQLite file holding everything a sampling campaign did.

The standard library's :mod:`sqlite3`, in WAL mode with foreign keys on.  The ledger records
the campaign's settings, each wave's plan (the model's fingerprint and the settings used),
every ask (wave, user, item), every answer imported (the file's digest and the row it came
from), opt-outs (user, since when, where the request came from) and the model each wave's
answers were folded into.  Every change is one transaction: a failure part-way (a crash in an
import, say) leaves the ledger as it was.  A schema version gates opening: a ledger written by a
newer release is refused with one line rather than misread.

Ratings are personal data and the ledger lists whom a campaign contacted: keep it where the
ratings are kept, and erase a person on request (:meth:`Ledger.erase`).

>>> import tempfile, os
>>> path = os.path.join(tempfile.mkdtemp(), "c.ledger")
>>> led = Ledger.create(path, {"budget": 10})
>>> wave = led.add_wave("f00d", {"budget": 10}, [("u1", "i1", 1, 0.5, 4.0), ("u2", "i1", 2, 0.4, 3.5)])
>>> led.record_import(wave, "abcd", "answers.csv", [(1, "u1", "i1", 4.5)])
1
>>> led.asks_by_user().to_dict()
{'u1': 1, 'u2': 1}
>>> led.opt_out(["u2"], source="email"), sorted(led.opted_out())
(1, ['u2'])
"""
from __future__ import annotations

import json
import sqlite3
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

from hybrid.common.errors import InputError

SCHEMA_VERSION = 1
_MAGIC = b"SQLite format 3\x00"
SUFFIX = ".ledger"

_SCHEMA = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE waves (
    wave INTEGER PRIMARY KEY,
    planned_at TEXT NOT NULL,
    model_fingerprint TEXT NOT NULL,
    settings TEXT NOT NULL,
    summary TEXT NOT NULL DEFAULT '{}',
    folded_into TEXT,
    folded_at TEXT);
CREATE TABLE asks (
    wave INTEGER NOT NULL REFERENCES waves(wave),
    user TEXT NOT NULL,
    item TEXT NOT NULL,
    ord INTEGER NOT NULL,
    propensity REAL NOT NULL,
    expected_rating REAL,
    PRIMARY KEY (wave, user, item));
CREATE INDEX asks_pair ON asks (user, item);
CREATE TABLE imports (
    id INTEGER PRIMARY KEY,
    wave INTEGER NOT NULL REFERENCES waves(wave),
    digest TEXT NOT NULL UNIQUE,
    source TEXT NOT NULL,
    imported_at TEXT NOT NULL,
    model_fingerprint TEXT);
CREATE TABLE answers (
    import_id INTEGER NOT NULL REFERENCES imports(id),
    row INTEGER NOT NULL,
    user TEXT NOT NULL,
    item TEXT NOT NULL,
    rating REAL NOT NULL,
    asked_wave INTEGER,
    PRIMARY KEY (import_id, row));
CREATE INDEX answers_pair ON answers (user, item);
CREATE TABLE wave_items (
    wave INTEGER NOT NULL REFERENCES waves(wave),
    item TEXT NOT NULL,
    planned INTEGER NOT NULL,
    asks INTEGER NOT NULL,
    expected_answers REAL NOT NULL,
    stability_before REAL NOT NULL,
    stability_expected REAL NOT NULL,
    kept_expected REAL NOT NULL,
    answers INTEGER,
    kept_predicted REAL,
    kept_seen REAL,
    stability_after REAL,
    PRIMARY KEY (wave, item));
CREATE TABLE optouts (user TEXT PRIMARY KEY, since TEXT NOT NULL, source TEXT NOT NULL);
CREATE TABLE erasures (id INTEGER PRIMARY KEY, at TEXT NOT NULL, asks INTEGER NOT NULL,
                       answers INTEGER NOT NULL, optouts INTEGER NOT NULL);
"""


# what a wave's plan records of each item it buys (the rest of wave_items comes with the answers)
_ITEM_PLAN = ("item", "planned", "asks", "expected_answers", "stability_before", "stability_expected", "kept_expected")


def now() -> str:
    """The time stamp the ledger writes (UTC, ISO 8601, to the second)."""
    return datetime.now(timezone.utc).replace(microsecond=0).isoformat()


class Ledger:
    """One campaign's ledger file (open it with :meth:`create` or :meth:`open`)."""

    def __init__(self, path: Path, conn: sqlite3.Connection):
        self.path = path
        self.conn = conn

    # ------------------------------------------------------------ opening
    @classmethod
    def create(cls, path, settings: dict, model_fingerprint: str = "") -> "Ledger":
        """A new ledger at ``path`` (refused if a file is there: a campaign is never overwritten)."""
        path = Path(path)
        if path.exists():
            raise InputError(f"{path} already exists; a campaign's ledger is never overwritten "
                             "(choose another name, or remove the old one yourself)")
        if not path.parent.is_dir():
            raise InputError(f"folder {path.parent} does not exist", file=str(path))
        conn = _connect(path)
        conn.executescript("BEGIN;" + _SCHEMA + "COMMIT;")   # the schema in one transaction
        led = cls(path, conn)
        with led.change():
            conn.executemany("INSERT INTO meta VALUES (?, ?)", [
                ("schema_version", str(SCHEMA_VERSION)), ("created", now()),
                ("settings", json.dumps(settings, sort_keys=True)), ("model_fingerprint", model_fingerprint)])
        return led

    @classmethod
    def open(cls, path) -> "Ledger":
        """An existing ledger; one clear line if ``path`` is not one this release can read."""
        path = Path(path)
        if not path.is_file():
            raise InputError(f"no campaign ledger at {path} (start one with `hybrid campaign start`)")
        with open(path, "rb") as f:      # look before connecting: SQLite would make any empty file a database
            if f.read(16) != _MAGIC:
                raise InputError(f"{path} is not a campaign ledger (not an SQLite file)")
        try:
            conn = _connect(path)
            version = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
        except sqlite3.DatabaseError:
            raise InputError(f"{path} is not a campaign ledger (an SQLite file without a meta table)") from None
        if version is None:
            raise InputError(f"{path} is not a campaign ledger (no schema version)")
        if int(version[0]) > SCHEMA_VERSION:
            raise InputError(f"{path} was written by a newer release (ledger schema {version[0]}, this release "
                             f"reads {SCHEMA_VERSION}); upgrade hybrid")
        return cls(path, conn)

    def close(self) -> None:
        self.conn.close()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @contextmanager
    def change(self):
        """One transaction: everything inside lands, or nothing does.  Once it has landed the
        write-ahead log is copied into the file (when no reader holds it), so that the file
        alone, copied or backed up, holds the whole ledger."""
        with _transaction(self.conn):
            yield self.conn
        self.conn.execute("PRAGMA wal_checkpoint(PASSIVE)")

    # ------------------------------------------------------------ settings
    @property
    def settings(self) -> dict:
        return json.loads(self._meta("settings"))

    def _meta(self, key):
        row = self.conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return None if row is None else row[0]

    # ------------------------------------------------------------ waves and asks
    def add_wave(self, model_fingerprint: str, settings: dict, asks, summary: dict | None = None,
                 items: pd.DataFrame | None = None) -> int:
        """Record a wave's plan, its asks ``(user, item, order, propensity, expected_rating)`` and
        what it expects of each item it buys (``items``: the columns of ``wave_items`` up to
        ``kept_expected``); returns the wave's number (1, 2, ...)."""
        with self.change() as c:
            wave = int(c.execute("SELECT COALESCE(MAX(wave), 0) + 1 FROM waves").fetchone()[0])
            c.execute("INSERT INTO waves (wave, planned_at, model_fingerprint, settings, summary) VALUES (?, ?, ?, ?, ?)",
                      (wave, now(), model_fingerprint, json.dumps(settings, sort_keys=True, default=str),
                       json.dumps(summary or {}, sort_keys=True, default=float)))
            c.executemany("INSERT INTO asks VALUES (?, ?, ?, ?, ?, ?)",
                          [(wave, str(u), str(i), int(o), float(p), None if e is None else float(e))
                           for u, i, o, p, e in asks])
            if items is not None and len(items):
                cols = list(_ITEM_PLAN)
                c.executemany(f"INSERT INTO wave_items (wave, {', '.join(cols)}) VALUES (?{', ?' * len(cols)})",
                              [(wave, *row) for row in items[cols].itertuples(index=False, name=None)])
        return wave

    def wave_items(self, wave: int | None = None) -> pd.DataFrame:
        """What each wave expected of each item it bought, and (once its answers are in) what came."""
        where, args = ("WHERE wave = ?", (wave,)) if wave is not None else ("", ())
        return pd.read_sql_query(f"SELECT * FROM wave_items {where} ORDER BY wave, item", self.conn, params=args)

    def waves(self) -> pd.DataFrame:
        """One row per wave: when planned, from which model, settings and summary (as dicts)."""
        df = pd.read_sql_query("SELECT * FROM waves ORDER BY wave", self.conn)
        for col in ("settings", "summary"):
            df[col] = df[col].map(json.loads)
        return df

    def last_wave(self) -> int:
        return int(self.conn.execute("SELECT COALESCE(MAX(wave), 0) FROM waves").fetchone()[0])

    def asks(self, wave: int | None = None) -> pd.DataFrame:
        """Asks (wave, user, item, ord, propensity, expected_rating), all or one wave's."""
        where, args = ("WHERE wave = ?", (wave,)) if wave is not None else ("", ())
        return pd.read_sql_query(f"SELECT * FROM asks {where} ORDER BY wave, item, ord", self.conn, params=args)

    def asks_by_user(self) -> pd.Series:
        """How many times each user has been asked over the whole campaign."""
        rows = self.conn.execute("SELECT user, COUNT(*) FROM asks GROUP BY user ORDER BY user").fetchall()
        return pd.Series(dict(rows), dtype="int64")

    # ------------------------------------------------------------ answers
    def has_import(self, digest: str) -> int | None:
        row = self.conn.execute("SELECT wave FROM imports WHERE digest = ?", (digest,)).fetchone()
        return None if row is None else int(row[0])

    def record_import(self, wave: int, digest: str, source: str, rows, model_fingerprint: str = "",
                      outcome: pd.DataFrame | None = None) -> int:
        """Record a wave's answers ``(row, user, item, rating)``, each matched to the wave (this one
        or an earlier one) that asked for it, if any; the model they were folded into; and, in
        ``outcome`` (columns item, answers, kept_predicted, kept_seen, stability_after), what
        came of the wave's items.  One transaction.  Returns the import's id."""
        with self.change() as c:
            cur = c.execute("INSERT INTO imports (wave, digest, source, imported_at, model_fingerprint) "
                            "VALUES (?, ?, ?, ?, ?)", (wave, digest, source, now(), model_fingerprint))
            imp = cur.lastrowid
            c.executemany("INSERT INTO answers (import_id, row, user, item, rating) VALUES (?, ?, ?, ?, ?)",
                          [(imp, int(r), str(u), str(i), float(v)) for r, u, i, v in rows])
            c.execute("UPDATE answers SET asked_wave = (SELECT MAX(a.wave) FROM asks a WHERE a.user = answers.user "
                      "AND a.item = answers.item AND a.wave <= ?) WHERE import_id = ?", (wave, imp))
            if model_fingerprint:
                c.execute("UPDATE waves SET folded_into = ?, folded_at = ? WHERE wave = ?",
                          (model_fingerprint, now(), wave))
            if outcome is not None and len(outcome):
                c.executemany("UPDATE wave_items SET answers = ?, kept_predicted = ?, kept_seen = ?, stability_after = ? "
                              "WHERE wave = ? AND item = ?",
                              [(int(a), float(p), float(s), float(t), wave, str(i)) for i, a, p, s, t in
                               outcome[["item", "answers", "kept_predicted", "kept_seen", "stability_after"]]
                               .itertuples(index=False, name=None)])
        return imp

    def answers(self) -> pd.DataFrame:
        """Every answer imported: wave (of the import), user, item, rating, asked_wave (NULL: unasked)."""
        return pd.read_sql_query(
            "SELECT i.wave, a.user, a.item, a.rating, a.asked_wave, i.source, a.row FROM answers a "
            "JOIN imports i ON i.id = a.import_id ORDER BY i.wave, a.import_id, a.row", self.conn)

    def pairs(self) -> pd.DataFrame:
        """Each (user, item) asked: the last wave it was asked in and whether it was answered."""
        return pd.read_sql_query(
            "SELECT a.user, a.item, MAX(a.wave) AS last_wave, "
            "EXISTS (SELECT 1 FROM answers b WHERE b.user = a.user AND b.item = a.item) AS answered "
            "FROM asks a GROUP BY a.user, a.item", self.conn)

    def response_counts(self) -> pd.DataFrame:
        """Per user asked: asks and the asks answered (over waves whose answers are in)."""
        return pd.read_sql_query(
            "SELECT a.user, COUNT(*) AS asks, SUM(EXISTS (SELECT 1 FROM answers b WHERE b.user = a.user "
            "AND b.item = a.item AND b.asked_wave = a.wave)) AS answered FROM asks a "
            "WHERE a.wave IN (SELECT wave FROM imports) GROUP BY a.user ORDER BY a.user", self.conn)

    # ------------------------------------------------------------ opt-outs and erasure
    def opt_out(self, users, source: str, since: str | None = None) -> int:
        """Add users to the do-not-contact list (a user already on it keeps their first date).
        Returns how many were new to it."""
        with self.change() as c:
            before = c.execute("SELECT COUNT(*) FROM optouts").fetchone()[0]
            c.executemany("INSERT OR IGNORE INTO optouts VALUES (?, ?, ?)",
                          [(str(u), since or now(), source) for u in users])
            return int(c.execute("SELECT COUNT(*) FROM optouts").fetchone()[0] - before)

    def opted_out(self) -> set:
        return {r[0] for r in self.conn.execute("SELECT user FROM optouts")}

    def erase(self, user: str) -> dict:
        """Remove every row naming ``user`` (asks, answers, opt-out); the erasure itself is
        logged with counts only, never the id.  Returns the counts removed."""
        with self.change() as c:
            counts = {t: c.execute(f"DELETE FROM {t} WHERE user = ?", (user,)).rowcount
                      for t in ("asks", "answers", "optouts")}
            c.execute("INSERT INTO erasures (at, asks, answers, optouts) VALUES (?, ?, ?, ?)",
                      (now(), counts["asks"], counts["answers"], counts["optouts"]))
        # the freed pages and the write-ahead log could still hold the id: rewrite the file
        self.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        self.conn.execute("VACUUM")
        self.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        return counts


def _connect(path: Path) -> sqlite3.Connection:
    # isolation_level=None: transactions are opened explicitly (BEGIN IMMEDIATE), so a
    # statement never starts one behind our back
    try:
        conn = sqlite3.connect(str(path), isolation_level=None)
        conn.execute("PRAGMA journal_mode = WAL")
    except sqlite3.OperationalError as exc:   # a read-only place, a locked file
        raise InputError(f"{path}: cannot open the ledger ({exc})") from None
    conn.execute("PRAGMA foreign_keys = ON")
    conn.execute("PRAGMA secure_delete = ON")   # deleted rows are overwritten, not just unlinked
    return conn


@contextmanager
def _transaction(conn: sqlite3.Connection):
    began = not conn.in_transaction
    if began:
        conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        if began and conn.in_transaction:
            conn.execute("ROLLBACK")
        raise
    else:
        if began:
            conn.execute("COMMIT")
