"""Every command shown in the README runs as written, and CI runs the README's test command."""
import os
import re
import shlex
from pathlib import Path

import pytest
from typer.testing import CliRunner

from hybrid.cli import app

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text()


def quick_start():
    return re.findall(r"^    (python3 -m venv .*)$", README, re.M)


def test_quick_start_is_two_commands_and_ci_runs_the_test_one():
    demo, tests = quick_start()
    assert demo.endswith("hybrid demo demo-out") and tests.endswith("pytest -q")
    ci = (ROOT / ".ci/run").read_text().splitlines()
    assert tests in ci


def test_first_paragraph_states_the_job():
    first = README.split("\n\n")[1]
    for word in ("catalogue", "ratings", "attributes", "jointly", "no", "campaign"):
        assert word in first


def readme_commands():
    blocks = re.findall(r"```sh\n(.*?)```", README, re.S)
    return [line for block in blocks for line in block.strip().splitlines() if line.startswith("hybrid ")]


@pytest.mark.slow
def test_every_readme_command_runs(tmp_path):
    runner = CliRunner()
    old = os.getcwd()
    os.chdir(tmp_path)
    try:
        (tmp_path / "configs").mkdir()
        for name in ("coffee.toml", "default.toml"):
            (tmp_path / "configs" / name).write_text((ROOT / "configs" / name).read_text())
        demo = runner.invoke(app, ["demo", "demo-out"])
        assert demo.exit_code == 0, demo.output
        commands = readme_commands()
        assert len(commands) >= 10
        for line in commands:
            result = runner.invoke(app, shlex.split(line)[1:])
            assert result.exit_code == 0, (line, result.output)
    finally:
        os.chdir(old)
    # every option the prose mentions is a real option of some command (or of the benchmark script)
    import typer.main

    known = {"--help", "--large"}
    todo = list(typer.main.get_command(app).commands.values())
    while todo:     # commands, and the commands of groups (hybrid campaign ...)
        command = todo.pop()
        todo += list(getattr(command, "commands", {}).values())
        for param in command.params:
            known.update(getattr(param, "opts", []))
    for option in re.findall(r"`(--[a-z-]+)", README) + re.findall(r"\[(--[a-z-]+)", README):
        assert option in known, option


def test_readme_library_example_runs(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    code = re.findall(r"```python\n(.*?)```", README, re.S)
    assert code
    scope = {}
    exec(compile(code[0], "README.md", "exec"), scope)
    assert scope["vectors"].shape == (40, 6) and scope["scores"].shape == (1,)
    assert (scope["same"].item_blocks_ == scope["model"].item_blocks_).all()
    assert set(scope["plan"].items["status"]) <= {"no ratings yet", "under-covered", "trusted"}


def _column_table() -> set[str]:
    """The names in the first cell of each row of the README's table "Every column"."""
    section = README.split("### Every column", 1)[1].split("\n#", 1)[0]
    rows = [line for line in section.splitlines() if line.startswith("| `")]
    return {name for row in rows for name in re.findall(r"`([a-z_NL0-9]+)`", row.split("|")[1])}


def _campaign_columns(fitted):
    import copy
    import tempfile
    from pathlib import Path

    from hybrid.planning.waves import Campaign

    model = copy.deepcopy(fitted)
    c = Campaign.start(Path(tempfile.mkdtemp()) / "c.ledger", model, plan_settings={"draws": 16})
    _, p = c.plan_wave(model, budget=20)
    return set(c.contact_sheet().columns) | set(c.progress().columns)


def test_every_column_any_command_writes_is_in_the_column_table(fitted, club):
    import pandas as pd

    from hybrid import plan
    from hybrid.estimator.batch import flat_columns, score_items
    from hybrid.evaluation.evaluate import evaluate
    from hybrid.evaluation.tune import tune
    from hybrid.planning.calibration import calibrate, calibrate_updates

    rows = pd.concat(score_items(fitted, club.new_lots, audience=2, neighbours=2, keep=[]))
    p = plan(fitted, budget=20, draws=16)
    params = {"rank": 3, "epochs": 3, "schema": club.schema, "text_min_df": 1}
    written = (set(flat_columns(rows).columns) | set(rows.columns) | set(p.items.columns) | set(p.asks.columns)
               | set(fitted.related(["L0001"], k=2).columns) | {"part", "effect"}
               | set(evaluate(club.ratings, club.lots, params, folds=2).columns)
               | set(calibrate(club.ratings, club.lots, params, ns=(0, 5), min_ratings=20, n_probe=8, draws=8).columns)
               | set(calibrate_updates(club.ratings, club.lots, params, ns=(2,), min_ratings=20, n_probe=8,
                                       draws=8).columns)
               | set(tune(club.ratings, club.lots, params, trials=1)[0].columns)
               | _campaign_columns(fitted))
    table = _column_table()
    named = {re.sub(r"^needed_[0-9.]+$", "needed_L", re.sub(r"_\d+(?=_|$)", "_N", c)) for c in written}
    missing = sorted(c for c in named if c not in table and re.sub(r"_(mean|sd)$", "", c) not in table)
    assert not missing, missing
