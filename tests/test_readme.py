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

    group = typer.main.get_command(app)
    known = {"--help", "--large"}
    for command in group.commands.values():
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


def test_every_column_score_and_plan_write_is_described(fitted, club):
    # every column of the scores (flat and JSON), the plan and the asks stands in the README in
    # backticks; numbered columns as user_N, neighbour_N, reason_N
    import pandas as pd

    from hybrid import plan
    from hybrid.estimator.batch import flat_columns, score_items

    rows = pd.concat(score_items(fitted, club.new_lots, audience=2, neighbours=2))
    p = plan(fitted, budget=20, draws=16)
    columns = set(flat_columns(rows).columns) | set(rows.columns) | set(p.items.columns) | set(p.asks.columns)
    documented = set(re.findall(r"`([a-z_N0-9]+)`", README))
    missing = sorted(c for c in columns if re.sub(r"_\d+(?=_|$)", "_N", c) not in documented)
    assert not missing, missing


@pytest.mark.slow
def test_every_example_in_help_runs(tmp_path):
    # each command's "Example:" line, run as written inside the folder the demo writes
    import typer.main

    runner = CliRunner()
    assert runner.invoke(app, ["demo", str(tmp_path)]).exit_code == 0
    group = typer.main.get_command(app)
    examples = [" ".join(e.split()) for cmd in group.commands.values()
                for e in re.findall(r"Example: (.*?)(?:\n\n|$)", cmd.help or "", re.S)]
    assert len(examples) == len(group.commands) - 1          # every command but `version`
    old = os.getcwd()
    os.chdir(tmp_path)
    try:
        for line in examples:
            result = runner.invoke(app, shlex.split(line)[1:])
            assert result.exit_code == 0, (line, result.output)
    finally:
        os.chdir(old)
