"""TOML settings: defaults, loading, and validation of keys.

Every setting has a default here; ``configs/default.toml`` documents the
same values (a test keeps the two equal).  A user's file overrides any
subset.  Unknown keys are an error that names the key and suggests the
nearest known one, because a misspelt key silently ignored is a setting
the user believes is in force and is not.
"""
from __future__ import annotations

import copy
import tomllib
from pathlib import Path
from typing import Any

from hybrid.common.errors import InputError, did_you_mean
from hybrid.common.limits import JOBS, PLAN, SCORE, threads

DEFAULTS: dict[str, dict[str, Any]] = {
    "ratings": {
        "user": "user",
        "item": "item",
        "rating": "rating",
        "timestamp": "",
        "scale": [1.0, 5.0],
        "duplicates": "error",
        "delimiter": ",",
    },
    "attributes": {
        "id": "item",
        "tag_separator": "|",
        "delimiter": ",",
        "columns": {},
    },
    "features": {
        "text_max_features": 2000,
        "text_min_df": 2,
        "text_ngrams": 1,
    },
    "model": {
        "rank": 16,
        "rank_choice": "fixed",
        "lam_user": "auto",
        "lam_item": "auto",
        "lam_map": "auto",
        "epochs": 25,
        "tol": 1e-5,
        "seed": 0,
        "prior": "learned",
        "map_weighting": "none",
        "weight_half": 20.0,
        "launch_offset": "learned",
        "holdout": 0.05,
        "n_jobs": -1,
    },
    "score": {
        "liked": 4.0,
        "audience": 10,
        "neighbours": 5,
        "chunk": 2000,
    },
    "plan": {
        "target": 0.8,
        "k": 10,
        "draws": 64,
        "max_needed": 200,
        "responders": "active",
        "responder_threshold": 0.0,
        "pool_min_ratings": 20,
        "aim": "reach",
        "seed": 0,
    },
    "engine": {
        "kind": "local",
        "address": "",
        "partitions": 8,
        "workers": 2,
        "shared_dir": "",
    },
}

COLUMN_TYPES = ("text", "category", "tags", "number", "ignore")
_FREE_TABLES = {("attributes", "columns")}


def _merge(base: dict, update: dict, where: tuple, source: str) -> None:
    for key, value in update.items():
        path = where + (key,)
        if key not in base:
            dotted = ".".join(path)
            raise InputError(
                f"unknown setting '{dotted}'{did_you_mean(key, base)}", file=source
            )
        if path in _FREE_TABLES:
            if not isinstance(value, dict):
                raise InputError(f"'{'.'.join(path)}' must be a table", file=source)
            base[key] = dict(value)
        elif isinstance(base[key], dict):
            if not isinstance(value, dict):
                raise InputError(f"'{'.'.join(path)}' must be a table", file=source)
            _merge(base[key], value, path, source)
        else:
            base[key] = value


def load_config(path: str | Path | None = None, overrides: dict | None = None) -> dict:
    """Return the settings: defaults, updated by a TOML file and overrides.

    Parameters
    ----------
    path : str or Path, optional
        A TOML file.  ``None`` gives the defaults.
    overrides : dict, optional
        Nested mapping applied after the file, same keys as the file.

    Examples
    --------
    >>> cfg = load_config(overrides={"model": {"rank": 8}})
    >>> cfg["model"]["rank"], cfg["model"]["lam_user"]
    (8, 'auto')
    """
    cfg = copy.deepcopy(DEFAULTS)
    if path is not None:
        path = Path(path)
        if not path.is_file():
            raise InputError("config file not found", file=str(path))
        try:
            data = tomllib.loads(path.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise InputError(f"not valid TOML: {exc}", file=str(path)) from None
        _merge(cfg, data, (), str(path))
    if overrides:
        _merge(cfg, overrides, (), "overrides")
    validate(cfg, str(path) if path else "settings")
    return cfg


def settings_for(model, config=None) -> dict:
    """The settings a command runs with: a given file, else those the model was trained with."""
    if config is not None:
        return load_config(config)
    return getattr(model, "settings_", None) or load_config()


def column_schema(cfg: dict) -> dict[str, dict]:
    """Normalise ``[attributes.columns]`` to ``{name: {"type", "weight"}}``."""
    out = {}
    for name, spec in cfg["attributes"]["columns"].items():
        if isinstance(spec, str):
            spec = {"type": spec}
        if not isinstance(spec, dict) or "type" not in spec:
            raise InputError(f"column '{name}': expected a type name or a table with 'type'")
        kind = spec["type"]
        if kind not in COLUMN_TYPES:
            raise InputError(
                f"column '{name}': unknown attribute type '{kind}', expected one of "
                f"{', '.join(COLUMN_TYPES)}{did_you_mean(str(kind), COLUMN_TYPES)}"
            )
        extra = set(spec) - {"type", "weight"}
        if extra:
            raise InputError(f"column '{name}': unknown key '{sorted(extra)[0]}'")
        out[name] = {"type": kind, "weight": float(spec.get("weight", 1.0))}
    return out


def _penalty_ok(value) -> bool:
    """A penalty is ``'auto'`` (chosen on held-out ratings) or a number > 0."""
    if isinstance(value, str):
        return value == "auto"
    return isinstance(value, (int, float)) and not isinstance(value, bool) and value > 0


def _jobs_ok(value) -> bool:
    try:
        threads(value)
    except InputError:
        return False
    return True


def validate(cfg: dict, source: str) -> None:
    """Check value types and ranges that would otherwise fail deep inside."""
    m = cfg["model"]
    checks = [
        (isinstance(m["rank"], int) and m["rank"] >= 1, "model.rank", "a whole number >= 1"),
        (m["rank_choice"] in ("held-out", "fixed"), "model.rank_choice", "'held-out' or 'fixed'"),
        *[(_penalty_ok(m[name]), f"model.{name}", "a number > 0 or 'auto'")
          for name in ("lam_user", "lam_item", "lam_map")],
        (isinstance(m["epochs"], int) and m["epochs"] >= 1, "model.epochs", "a whole number >= 1"),
        (m["prior"] in ("fixed", "learned"), "model.prior", "'fixed' or 'learned'"),
        (m["map_weighting"] in ("none", "precision", "bias"), "model.map_weighting", "'none', 'precision' or 'bias'"),
        (m["launch_offset"] in ("learned", "none"), "model.launch_offset", "'learned' or 'none'"),
        (0 <= m["holdout"] < 1, "model.holdout", "a fraction in [0, 1)"),
        (_jobs_ok(m["n_jobs"]), "model.n_jobs", JOBS),
        (cfg["ratings"]["duplicates"] in ("error", "last"), "ratings.duplicates", "'error' or 'last'"),
        (len(cfg["ratings"]["scale"]) == 2 and cfg["ratings"]["scale"][0] < cfg["ratings"]["scale"][1],
         "ratings.scale", "[low, high] with low < high"),
        *[(rules[name][0](value), f"{section}.{name}", rules[name][1])
          for section, rules in (("plan", PLAN), ("score", SCORE))
          for name, value in cfg[section].items() if name in rules],
        (cfg["engine"]["kind"] in ("local", "dask"), "engine.kind", "'local' or 'dask'"),
        (isinstance(cfg["engine"]["address"], str), "engine.address", "a scheduler address such as "
         "'tcp://10.0.0.5:8786', or '' to start a local cluster"),
        (isinstance(cfg["engine"]["partitions"], int) and cfg["engine"]["partitions"] >= 1,
         "engine.partitions", "a whole number >= 1"),
        (isinstance(cfg["engine"]["workers"], int) and cfg["engine"]["workers"] >= 1,
         "engine.workers", "a whole number >= 1"),
        (isinstance(cfg["engine"]["shared_dir"], str), "engine.shared_dir", "a folder path, or ''"),
    ]
    for ok, key, expected in checks:
        if not ok:
            section, name = key.split(".")
            raise InputError(f"setting '{key}': expected {expected}, found {cfg[section][name]!r}", file=source)
    column_schema(cfg)


def model_params(cfg: dict) -> dict:
    """The keyword arguments of :class:`hybrid.HybridFactorModel` from settings."""
    m = cfg["model"]
    return {
        "rank": m["rank"], "rank_choice": m["rank_choice"],
        **{name: m[name] if m[name] == "auto" else float(m[name]) for name in ("lam_user", "lam_item", "lam_map")},
        "epochs": m["epochs"], "tol": float(m["tol"]),
        "seed": m["seed"], "prior": m["prior"], "map_weighting": m["map_weighting"],
        "weight_half": float(m["weight_half"]), "launch_offset": m["launch_offset"],
        "holdout": float(m["holdout"]), "n_jobs": m["n_jobs"],
        "schema": column_schema(cfg),
        "text_max_features": cfg["features"]["text_max_features"],
        "text_min_df": cfg["features"]["text_min_df"],
        "text_ngrams": cfg["features"]["text_ngrams"],
        "tag_separator": cfg["attributes"]["tag_separator"],
        "engine": cfg["engine"]["kind"], "address": cfg["engine"]["address"] or None,
        "partitions": cfg["engine"]["partitions"], "shared_dir": cfg["engine"]["shared_dir"] or None,
    }


def with_engine(cfg: dict, kind: str | None = None, address: str | None = None,
                partitions: int | None = None) -> dict:
    """The settings with the command line's engine flags applied (and checked)."""
    flags = {"kind": kind, "address": address, "partitions": partitions}
    flags = {k: v for k, v in flags.items() if v is not None}
    if not flags:
        return cfg
    cfg = copy.deepcopy(cfg)
    if "address" in flags and "kind" not in flags:
        flags["kind"] = "dask"  # an address only makes sense for a cluster
    _merge(cfg, {"engine": flags}, (), "command line")
    validate(cfg, "command line")
    return cfg
