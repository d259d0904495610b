"""Every setting declared once (hybrid.common.limits.SETTINGS): the estimator's defaults, the
settings file's defaults, configs/default.toml and the checks all follow the one table, and a
bad value fails with the same words from the library, a settings file and the command line."""
import inspect
import re
from pathlib import Path

import pytest
from typer.testing import CliRunner

from hybrid import HybridFactorModel, InputError, plan
from hybrid.app.config import DEFAULTS, load_config, render_defaults
from hybrid.cli import app
from hybrid.common.limits import ESTIMATOR, SETTINGS
from hybrid.datasets.club import tasting_club, write_samples

ROOT = Path(__file__).resolve().parents[1]

# the three the library once let through (an IndexError, a division by zero, a TypeError)
BAD = [("model", "epochs", 0, "epochs must be a whole number >= 1, found 0"),
       ("model", "weight_half", 0.0, "weight_half must be a number > 0, found 0.0"),
       ("plan", "responders", "activ", "responders must be one of 'active', 'likely', found 'activ'")]


def test_default_toml_is_the_table_rendered():
    assert (ROOT / "configs/default.toml").read_text() == render_defaults()


def test_estimator_and_settings_file_share_every_default():
    signature = inspect.signature(HybridFactorModel).parameters
    for name, setting in ESTIMATOR.items():
        assert signature[name].default == setting.default, name
    assert set(signature) - set(ESTIMATOR) == {"schema"}
    assert DEFAULTS["model"]["holdout"] == HybridFactorModel().holdout == 0.05
    assert DEFAULTS["model"]["n_jobs"] == HybridFactorModel().n_jobs == -1
    plan_defaults = inspect.signature(plan).parameters
    for name in ("target", "k", "draws", "max_needed", "aim", "responders", "candidate_min_ratings", "seed"):
        assert plan_defaults[name].default == SETTINGS["plan"][name].default, name


@pytest.fixture(scope="module")
def club(tmp_path_factory):
    folder = tmp_path_factory.mktemp("settings")
    data = tasting_club(n_members=200, n_lots=40, n_new=2, seed=5)
    return data, write_samples(folder, data), folder


@pytest.mark.parametrize("section, name, value, words", BAD)
def test_a_bad_value_fails_alike_from_library_file_and_command_line(club, section, name, value, words):
    data, paths, folder = club
    with pytest.raises(InputError, match=words):   # the library
        if section == "model":
            HybridFactorModel(**{name: value}, schema=data.schema, text_min_df=1).fit(data.ratings, data.lots)
        else:
            model = HybridFactorModel(rank=2, epochs=2, schema=data.schema, text_min_df=1).fit(data.ratings, data.lots)
            plan(model, **{name: value})
    toml = folder / f"bad-{name}.toml"
    shown = f"'{value}'" if isinstance(value, str) else repr(value)
    base = re.sub(rf"(?m)^{name} = .*\n", "", (ROOT / "configs/coffee.toml").read_text())
    toml.write_text(base + f"\n[{section}]\n{name} = {shown}\n" if section == "plan" else
                    base.replace("[model]\n", f"[model]\n{name} = {shown}\n"))
    with pytest.raises(InputError, match=f"setting '{section}.{name}' " + words.split(" ", 1)[1]):   # the file
        load_config(toml)
    args = (["train", paths["ratings"], paths["lots"], "--out", folder / "m.hybrid"] if section == "model"
            else ["plan", folder / "m.hybrid", "--out", folder / "p.csv"])
    if section == "plan":
        assert CliRunner().invoke(app, [str(a) for a in ["train", paths["ratings"], paths["lots"], "--config",
                                        ROOT / "configs/coffee.toml", "--out", folder / "m.hybrid"]]).exit_code == 0
    done = CliRunner().invoke(app, [str(a) for a in [*args, "--config", toml]])   # the command line
    assert done.exit_code == 2 and done.stderr.count("\n") == 1
    assert words.split(" ", 1)[1] in done.stderr and f"{section}.{name}" in done.stderr


def test_a_renamed_setting_still_works_for_one_release_with_a_notice(tmp_path):
    # plan.pool_min_ratings is now plan.candidate_min_ratings (README, "Words used here")
    import warnings

    old = tmp_path / "old.toml"
    old.write_text("[plan]\npool_min_ratings = 7\n")
    with pytest.warns(FutureWarning, match="setting 'plan.pool_min_ratings' is now 'plan.candidate_min_ratings'"):
        cfg = load_config(old)
    assert cfg["plan"]["candidate_min_ratings"] == 7 and "pool_min_ratings" not in cfg["plan"]
    club = tasting_club(n_members=300, n_lots=60, n_new=3, seed=2)
    model = HybridFactorModel(rank=3, epochs=3, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    with pytest.warns(FutureWarning, match="candidate_min_ratings"):
        a = plan(model, draws=8, pool_min_ratings=7)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        b = plan(model, draws=8, candidate_min_ratings=7)
    assert a.items.equals(b.items)
    # a model file whose stored settings use the old name reads as if written with the new
    model.set_fitted(settings_={**load_config(), "plan": {**load_config()["plan"]}})
    model.settings_["plan"]["pool_min_ratings"] = model.settings_["plan"].pop("candidate_min_ratings")
    model.save(tmp_path / "m.hybrid")
    assert HybridFactorModel.load(tmp_path / "m.hybrid").settings_["plan"]["candidate_min_ratings"] == 20
    # and the command line says it in one line
    done = CliRunner().invoke(app, ["plan", str(tmp_path / "m.hybrid"), "--config", str(old), "--out",
                                    str(tmp_path / "p.csv")])
    assert done.exit_code == 0, done.output
    notes = [line for line in done.stderr.splitlines() if "pool_min_ratings" in line]
    assert len(notes) == 1 and notes[0].startswith("note: ") and "until the next release" in notes[0]
