"""TOML settings: defaults, loading, and validation of keys.

Every setting's default, rule and help live in one table,
:data:`hybrid.common.limits.SETTINGS`; ``configs/default.toml`` is rendered from it
(:func:`render_defaults`; a test keeps the file equal to the rendering).  A user's file overrides any
subset.  Unknown keys are an error that names the key and suggests the
nearest known one, because a misspelt key silently ignored is a setting
the user believes is in force and is not.
"""
from __future__ import annotations

import copy
import json
import tomllib
import warnings
from pathlib import Path
from typing import Any

from hybrid.common.errors import InputError, did_you_mean
from hybrid.common.limits import ESTIMATOR, SETTINGS, defaults, upgrade_settings

# the defaults, from the one table of settings (hybrid.common.limits.SETTINGS)
DEFAULTS: dict[str, dict[str, Any]] = {section: defaults(section) for section in SETTINGS}
DEFAULTS["attributes"]["columns"] = {}

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
        upgrade_settings(data, lambda old, new: warnings.warn(
            f"{path}: setting '{old}' is now '{new}'; the old name works until the next release",
            FutureWarning, stacklevel=2))
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


def validate(cfg: dict, source: str) -> None:
    """Check every value against its rule, with the same words as the library's checks."""
    for section, table in SETTINGS.items():
        for name, value in cfg[section].items():
            rule = table.get(name)
            if rule is not None and not rule.ok(value):
                raise InputError(f"setting '{section}.{name}' must be {rule.allowed}, found {value!r}", file=source)
    if cfg["model"]["map_weighting"] == "bias" and not cfg["model"]["biases"]:
        raise InputError("setting 'model.map_weighting' = 'bias' needs model.biases = true", file=source)
    column_schema(cfg)


def model_params(cfg: dict) -> dict:
    """The keyword arguments of :class:`hybrid.HybridFactorModel` from settings."""
    values = {**cfg["model"], **cfg["features"], "tag_separator": cfg["attributes"]["tag_separator"]}
    return {"schema": column_schema(cfg), **{name: values[name] for name in ESTIMATOR}}


def render_defaults() -> str:
    """``configs/default.toml``: every setting the file may hold, its default and its help."""
    lines = ["# Every setting hybrid knows, with its default.  A config file may set any subset;",
             "# an unknown key is an error (with the closest known key suggested).",
             "# Rendered from hybrid.common.limits.SETTINGS (python -c 'from hybrid.app.config import",
             "# render_defaults; print(render_defaults(), end=\"\")' > configs/default.toml)."]
    for section, table in SETTINGS.items():
        lines += ["", f"[{section}]"]
        for name, setting in table.items():
            if not setting.in_file:
                continue
            head = f"{name} = {_toml_value(setting.default)}"
            first, *rest = setting.help.split("\n")
            width = max(25, len(head) + 2)
            lines.append(f"{head:<{width}}# {first}")
            lines += [f"{'':<{width}}# {more}" for more in rest]
        if section == "attributes":
            lines += ["", '# One entry per attribute column: "text", "category", "tags", "number" or "ignore",',
                      '# or a table with a weight, e.g.  notes = { type = "text", weight = 2.0 }',
                      "[attributes.columns]"]
    return "\n".join(lines) + "\n"


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)   # a TOML basic string for the plain text used here
    return json.dumps(value) if isinstance(value, list) else repr(value)


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
