"""Screens for people: every command's table at 80 columns shows each number whole, and each
number equals (to the decimals shown) the value the same command gives machines (--format json)."""
import json
import re

import pandas as pd
import pytest
from typer.testing import CliRunner

from hybrid.app.nouns import speak
from hybrid.cli import app
from hybrid.cli.display import decimals, for_people

NUMBER = re.compile(r"^-?[\d,]*\.?\d+(?: ± [\d,]*\.?\d+)?$")


def _cells(line: str) -> list[str]:
    return [c.strip() for c in re.split(r"[│┃]", line)[1:-1]]


def read_screen_table(text: str) -> dict[str, list[str]]:
    """Heading -> the cells of its column, from a box-drawn table (headings may wrap; a text cell
    may wrap onto more lines, whose number cells are then blank)."""
    lines = text.splitlines()
    head = [_cells(line) for line in lines if line.startswith("┃")]
    body = [_cells(line) for line in lines if line.startswith("│")]
    headings = [" ".join(part for part in parts if part) for parts in zip(*head)]
    return {h: [row[j] for row in body] for j, h in enumerate(headings)}


def _close(shown: str, value: float) -> bool:
    d = len(shown.split(".")[1]) if "." in shown else 0
    return abs(float(shown.replace(",", "")) - value) <= 0.5 * 10 ** -d + 1e-12 * abs(value)


def check_numbers(screen: str, records: list[dict]) -> int:
    """Every number column of the screen's table against the records' fields; returns how many
    numbers were compared."""
    table = read_screen_table(screen)
    assert table, screen
    fields = {f: f for f in records[0]}
    compared = 0
    for heading, cells in table.items():
        numbers = [c for c in cells if c]
        if not numbers or not all(NUMBER.match(c) for c in numbers):
            continue
        assert len(numbers) == len(records), (heading, numbers)    # one whole number per row
        name = next((f for f in fields if for_people_heading(f) == heading), None)
        mean = next((f[:-5] for f in fields if f.endswith("_mean") and for_people_heading(f[:-5]) == heading), None)
        assert name or mean, (heading, list(fields))
        for shown, rec in zip(numbers, records):
            if mean:
                m, s = shown.split(" ± ")
                assert _close(m, rec[f"{mean}_mean"]) and _close(s, rec[f"{mean}_sd"]), (heading, shown, rec)
            else:
                assert _close(shown, rec[name]), (heading, shown, rec[name])
            compared += 1
    return compared


# the demo's settings speak of lots and members ([display]); the machine output keeps the fields
CLUB = {"item": "lot", "user": "member"}


def for_people_heading(field: str) -> str:
    return speak(list(for_people(pd.DataFrame({field: [1.5]})).columns)[0], CLUB)


def check_mapping(screen: str, values: dict) -> int:
    table = read_screen_table(screen)
    what, shown = table["what"], table["value"]
    pairs = []
    for w, v in zip(what, shown):     # a wrapped row continues on the next lines, one cell blank
        if w and (v or not pairs):
            pairs.append([w, v])
        else:
            pairs[-1][0] += (" " + w) if w else ""
            pairs[-1][1] += (" " + v) if v else ""
    rows = dict(pairs)
    compared = 0
    for key, value in values.items():
        key = speak(key, CLUB)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            assert _close(rows[key], float(value)) or float(rows[key].replace(",", "")) == pytest.approx(value, rel=5e-4)
            compared += 1
    return compared


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = tmp_path_factory.mktemp("screens")
    assert CliRunner().invoke(app, ["demo", str(folder)]).exit_code == 0
    return folder


def run(args, fmt):
    done = CliRunner(env={"COLUMNS": "80"}).invoke(app, [*args, "--format", fmt])
    assert done.exit_code == 0, done.output
    return done.stdout


TABLES = [
    ["score", "{d}/club.hybrid", "{d}/new_lots.csv", "--out", "{d}/s.csv"],
    ["related", "{d}/club.hybrid", "L0042", "--k", "5"],
    ["why", "{d}/club.hybrid", "L0601"],
    ["evaluate", "{d}/ratings.csv", "{d}/lots.csv", "--config", "{d}/coffee.toml", "--folds", "2"],
    ["calibrate", "{d}/ratings.csv", "{d}/lots.csv", "--config", "{d}/coffee.toml", "--probes", "20"],
    ["tune", "{d}/ratings.csv", "{d}/lots.csv", "--config", "{d}/coffee.toml", "--trials", "2", "--out", "{d}/b.toml"],
]


@pytest.mark.parametrize("args", TABLES, ids=[a[0] for a in TABLES])
def test_every_number_on_an_80_column_screen_is_whole_and_true(demo, args):
    args = [a.format(d=demo) for a in args]
    screen = run(args, "table")
    assert max(len(line) for line in screen.splitlines()) <= 80
    assert "…" not in screen
    records = json.loads(run(args, "json"))
    assert check_numbers(screen, records) >= len(records)


@pytest.mark.parametrize("args", [["inspect", "{d}/club.hybrid"],
                                  ["plan", "{d}/club.hybrid", "--budget", "50", "--out", "{d}/p.csv"]],
                         ids=["inspect", "plan"])
def test_every_number_in_a_summary_is_true(demo, args):
    args = [a.format(d=demo) for a in args]
    screen = run(args, "table")
    assert max(len(line) for line in screen.splitlines()) <= 80 and "…" not in screen
    values = json.loads(run(args, "json"))
    first = screen[screen.index("┏"):screen.index("└")]    # the summary: the first table
    assert check_mapping(first, values) >= 5


def test_a_column_keeps_one_count_of_decimals():
    assert decimals([0.9797, 1.117, 0.779]) == 3
    shown = for_people(pd.DataFrame({"rmse_mean": [1.117, 0.9797], "rmse_sd": [0.005, 0.0012], "n": [2, 10]}))
    assert list(shown.columns) == ["RMSE", "n"]
    assert shown["RMSE"].tolist() == ["1.117 ± 0.005", "0.980 ± 0.001"] and shown["n"].tolist() == ["2", "10"]


@pytest.mark.parametrize("args", [
    ["plan", "{d}/club.hybrid", "--budget", "20", "--out", "{d}/p2.csv"],
    ["report", "{d}/club.hybrid", "--out", "{d}/r.html"],
    ["calibrate", "{d}/ratings.csv", "{d}/lots.csv", "--config", "{d}/coffee.toml", "--probes", "20"],
    ["score", "{d}/club.hybrid", "{d}/new_lots.csv", "--out", "{d}/s2.csv", "--chunk", "5"],
    ["evaluate", "{d}/ratings.csv", "{d}/lots.csv", "--config", "{d}/coffee.toml", "--folds", "2"],
    ["demo", "{d}/again"],
], ids=["plan", "report", "calibrate", "score", "evaluate", "demo"])
def test_piped_output_carries_no_progress(demo, args):
    done = CliRunner().invoke(app, [a.format(d=demo) for a in args])
    assert done.exit_code == 0, done.output
    assert not re.search(r"[⠀-⣿]|\d+/\d+|\d:\d\d:\d\d", done.stderr), done.stderr   # no spinner, count or clock


def test_progress_shows_on_a_terminal_only(monkeypatch):
    import sys

    from hybrid.cli.display import CountProgress

    monkeypatch.setattr(sys.stderr, "isatty", lambda: True, raising=False)
    assert CountProgress(5, "x").enabled and not CountProgress(5, "x", quiet=True).enabled
    assert not CountProgress(5, "x", steps=1).enabled            # one chunk: nothing to show
    monkeypatch.setattr(sys.stderr, "isatty", lambda: False, raising=False)
    assert not CountProgress(None, "x").enabled


def test_the_long_library_calls_report_their_steps(club):
    from hybrid.evaluation.evaluate import evaluate
    from hybrid.planning.calibration import calibrate

    params = {"rank": 3, "epochs": 3, "schema": club.schema, "text_min_df": 1}
    seen = []
    evaluate(club.ratings, club.lots, params, folds=2, on_step=lambda *a: seen.append(a[:2]))
    assert seen == [(0, 2), (1, 2), (2, 2)]
    seen.clear()
    calibrate(club.ratings, club.lots, params, ns=(0, 5), min_ratings=20, n_probe=10, draws=8,
              on_step=lambda *a: seen.append(a[:2]))
    assert seen == [(0, 3), (1, 3), (2, 3), (3, 3)]


# words a one-word-per-idea rename retired (README, "Words used here"), and where they stood
RETIRED = {
    r"\bin_pool\b": "the plan's candidate column",
    r"\bpool_min_ratings\b": "the candidates' setting",
    r"neighbour candidates": "the candidates",
    r"\bnearest\b": "the neighbours",
    r"audience \(users\)": "the users likely to like it (the audience is a list of users)",
}


def test_screens_files_and_help_use_the_glossary_words(demo):
    import typer.main

    d = str(demo)
    texts = []
    group = typer.main.get_command(app)
    for name in group.commands:
        texts.append(CliRunner(env={"COLUMNS": "200"}).invoke(app, [name, "--help"]).stdout)
    for args in (["score", f"{d}/club.hybrid", f"{d}/new_lots.csv", "--out", f"{d}/g.jsonl"],
                 ["plan", f"{d}/club.hybrid", "--budget", "30", "--out", f"{d}/g.csv", "--asks", f"{d}/ga.csv"],
                 ["related", f"{d}/club.hybrid", "L0042"], ["why", f"{d}/club.hybrid", "L0601"],
                 ["inspect", f"{d}/club.hybrid"]):
        done = CliRunner(env={"COLUMNS": "200"}).invoke(app, args)
        assert done.exit_code == 0, done.output
        texts.append(done.stdout)
    texts += [(demo / name).read_text() for name in ("g.jsonl", "g.csv", "ga.csv", "report.html", "coffee.toml")]
    texts.append(open("configs/default.toml").read())
    for pattern, instead in RETIRED.items():
        found = [t[max(0, m.start() - 40):m.end() + 20] for t in texts for m in [re.search(pattern, t)] if m]
        assert not found, (pattern, instead, found[:2])
    # the files' columns: ask order and information, related position, the demo's rating column
    asks = pd.read_csv(demo / "ga.csv")
    assert list(asks.columns) == ["item", "user", "order", "information", "expected_rating", "answer_chance"]
    related = json.loads(CliRunner().invoke(app, ["related", f"{d}/club.hybrid", "L0042", "--format", "json"]).stdout)
    assert list(related[0]) == ["item", "position", "neighbour", "distance"]
    assert pd.read_csv(demo / "ratings.csv", nrows=1).columns.tolist() == ["member", "lot", "rating"]


def test_screens_and_the_report_speak_the_catalogues_nouns_files_keep_theirs(demo):
    # the demo's settings say [display] item = "lot", user = "member" (its model keeps them)
    d = str(demo)
    screen = run(["plan", f"{d}/club.hybrid", "--budget", "20", "--out", f"{d}/n.csv", "--asks", f"{d}/na.csv"],
                 "table")
    assert "more lots reaching the target with" in screen and "┃ lot " in screen   # (the key wraps at 80)
    assert not re.search(r"\bitems?\b", screen.split("Under-covered")[0])
    summary = json.loads(run(["plan", f"{d}/club.hybrid", "--budget", "20", "--out", f"{d}/n.csv"], "json"))
    assert "more items reaching the target with the plan" in summary            # machines keep the field names
    assert pd.read_csv(f"{d}/na.csv").columns[:2].tolist() == ["item", "user"]
    assert "members" in run(["inspect", f"{d}/club.hybrid"], "table")
    page = (demo / "report.html").read_text()
    assert "<h2>New lots</h2>" in page and "<h2>New items</h2>" not in page
    # a model trained without a [display] section speaks of items and users
    done = CliRunner().invoke(app, ["train", f"{d}/ratings.csv", f"{d}/lots.csv", "--config", "configs/coffee.toml",
                                    "--out", f"{d}/plain.hybrid", "--quiet"])
    assert done.exit_code == 0
    from hybrid import load
    from hybrid.app.nouns import nouns_of
    assert nouns_of(load(f"{d}/plain.hybrid").settings_) == {"item": "lot", "user": "member"}
    assert nouns_of({"plan": {}}) == {"item": "item", "user": "user"}


def test_help_speaks_the_catalogues_words_when_its_settings_are_given():
    # in a real process: the help reads --config from the command line it was given
    import os
    import subprocess
    import sys

    def helped(*args):
        return subprocess.run([sys.executable, "-m", "hybrid", "plan", *args, "--help"], capture_output=True,
                              text=True, env={**os.environ, "COLUMNS": "100"}, timeout=120).stdout

    club, plain = helped("--config", "configs/coffee.toml"), helped()
    assert "which lots are under-covered" in club and "Most asks per member" in club
    assert "--per-user" in club and "--new-items" in club          # flags keep their names
    assert "which items are under-covered" in plain and "lots" not in plain


def test_a_reader_that_stops_early_is_no_error(demo):
    # `hybrid score ... | true`: the reader is gone before the table is printed (the pipe is closed
    # by the time Python has started); the scores file is written and nothing is said (no "error:
    # broken pipe; nothing was written", which was untrue)
    import subprocess
    import sys

    out = demo / "piped.csv"
    done = subprocess.run(f"'{sys.executable}' -m hybrid score '{demo}/club.hybrid' '{demo}/new_lots.csv' "
                          f"--out '{out}' | true", shell=True, executable="/bin/bash", capture_output=True,
                          text=True, timeout=120)
    assert done.stderr == "", done.stderr
    assert len(pd.read_csv(out)) == len(pd.read_csv(demo / "new_lots.csv"))
