"""Settings: the documented defaults are the real ones, and bad keys are named."""
import tomllib
from pathlib import Path

import pytest

from hybrid.app.config import DEFAULTS, load_config, model_params
from hybrid.common.errors import InputError

ROOT = Path(__file__).resolve().parents[1]


def test_default_toml_documents_exactly_the_defaults():
    assert tomllib.loads((ROOT / "configs/default.toml").read_text()) == DEFAULTS   # and tests/test_settings.py: the file is the table rendered


def test_shipped_configs_load():
    for path in (ROOT / "configs").glob("*.toml"):
        cfg = load_config(path)
        assert model_params(cfg)["rank"] >= 1


def test_bad_values_are_named(tmp_path):
    p = tmp_path / "c.toml"
    p.write_text("[model]\nprior = 'magic'\n")
    with pytest.raises(InputError, match="setting 'model.prior' must be one of 'learned', 'fixed', found 'magic'"):
        load_config(p)
    p.write_text("[modle]\nrank = 3\n")
    with pytest.raises(InputError, match="unknown setting 'modle' \\(did you mean 'model'\\?\\)"):
        load_config(p)
    p.write_text("[model\nrank = 3\n")
    with pytest.raises(InputError, match="not valid TOML"):
        load_config(p)


def test_demo_settings_are_the_shipped_coffee_config():
    from hybrid.datasets.club import DEMO_CONFIG
    assert DEMO_CONFIG.read_text() == (ROOT / "configs/coffee.toml").read_text()


def test_catalog_samples_are_the_seeded_generator_output(tmp_path):
    from hybrid.datasets.club import write_samples
    write_samples(tmp_path)
    for name in ("ratings.csv", "lots.csv", "new_lots.csv"):
        assert (tmp_path / name).read_bytes() == (ROOT / "catalog_samples" / name).read_bytes(), name
