"""The command line: every command end to end, and bad input through the CLI."""
import json

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

import hybrid
from hybrid.cli import app
from hybrid.datasets.club import tasting_club, write_samples

runner = CliRunner()


def run(*args):
    return runner.invoke(app, [str(a) for a in args])


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("club")
    club = tasting_club(n_members=400, n_lots=80, n_new=6, seed=2)
    paths = write_samples(folder, club)
    cfg = folder / "coffee.toml"
    cfg.write_text(open("configs/coffee.toml").read().replace("epochs = 60 ", "epochs = 6 "))
    paths["config"] = cfg
    model = folder / "club.hybrid"
    result = run("train", paths["ratings"], paths["lots"], "--config", cfg, "--out", model, "--format", "json")
    assert result.exit_code == 0, result.output
    paths["model"] = model
    paths["summary"] = json.loads(result.stdout)
    return paths


def one_line_error(result, *fragments):
    assert result.exit_code == 2, (result.exit_code, result.output)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("hybrid: error: "), result.stderr
    assert "Traceback" not in result.output
    for f in fragments:
        assert f in lines[0], (f, lines[0])
    return lines[0]


def test_train_summary_and_model(files):
    s = files["summary"]
    assert s["users"] == 400 or s["users"] <= 400
    assert s["ratings fitted"] + s["ratings held out (to check the fit)"] == len(pd.read_csv(files["ratings"]))
    m = hybrid.load(files["model"])
    assert m.metrics_["train_rmse"] == pytest.approx(s["train RMSE"], abs=1e-4)
    assert m.launch_offset_ == pytest.approx(s["launch offset (new items' bias)"], abs=1e-4)
    assert m.settings_["ratings"]["user"] == "member"


def test_score_csv_and_jsonl_agree(files, tmp_path):
    csv, jsonl = tmp_path / "s.csv", tmp_path / "s.jsonl"
    assert run("score", files["model"], files["new_lots"], "--out", csv, "--chunk", "4").exit_code == 0
    assert run("score", files["model"], files["new_lots"], "--out", jsonl, "--audience", "3").exit_code == 0
    table = pd.read_csv(csv)
    recs = [json.loads(line) for line in jsonl.read_text().splitlines()]
    assert len(table) == len(recs) == 6
    assert np.allclose(table["expected_rating"], [r["expected_rating"] for r in recs])
    assert all(r["content_only"] for r in recs) and len(recs[0]["audience"]) == 3
    assert table["user_1_lift"].ge(table["user_2_lift"]).all()   # the audience by taste, best first
    # the expected rating is the mean of the item's column of the score matrix
    m = hybrid.load(files["model"])
    new = pd.read_csv(files["new_lots"], dtype=str).set_index("lot")
    S = m.score_matrix(table["item"].astype(str), attributes=new.assign(
        altitude_m=new["altitude_m"].astype(float), price=new["price"].astype(float)))
    S = np.clip(S, 1.0, 5.0)   # the demo's ratings span the whole scale
    assert np.allclose(table["expected_rating"], S.mean(axis=1), atol=1e-5)
    assert np.allclose(table["liked_share"], (S >= 4.0).mean(axis=1), atol=1e-9)


def test_related_and_inspect(files):
    result = run("related", files["model"], "L0003", "--k", "4", "--format", "csv")
    assert result.exit_code == 0
    table = pd.read_csv(pd.io.common.StringIO(result.stdout))
    assert table["position"].tolist() == [1, 2, 3, 4] and table["distance"].is_monotonic_increasing
    assert "L0003" not in table["neighbour"].tolist()
    info = json.loads(run("inspect", files["model"], "--format", "json").stdout)
    assert info["setting rank"] == 5 and "notes (text)" in info["attribute columns"]
    # where the fit's time went: the stages named, their seconds adding up to no more than the whole
    stages = dict(part.rsplit(" ", 1) for part in info["seconds by stage"].split(", "))
    assert {"penalty search", "epochs", "learned prior"} <= set(stages)
    assert sum(map(float, stages.values())) <= info["seconds"] + 0.05


def test_help_has_an_example():
    for cmd in ("train", "score", "related", "inspect", "demo"):
        result = run(cmd, "--help")
        assert result.exit_code == 0 and "Example: hybrid" in result.stdout, cmd


# ---- bad input: one clear line, exit 2, nothing written ------------------------------

def test_missing_and_empty_files(files, tmp_path):
    out = tmp_path / "m.hybrid"
    one_line_error(run("train", tmp_path / "nope.csv", files["lots"], "--config", files["config"], "--out", out),
                   "nope.csv", "file not found")
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    one_line_error(run("train", empty, files["lots"], "--config", files["config"], "--out", out), "empty")
    assert not out.exists()


def test_no_header_and_wrong_delimiter(files, tmp_path):
    out = tmp_path / "m.hybrid"
    raw = pd.read_csv(files["ratings"])
    nohead = tmp_path / "nohead.csv"
    raw.to_csv(nohead, header=False, index=False)
    one_line_error(run("train", nohead, files["lots"], "--config", files["config"], "--out", out), "missing column")
    semi = tmp_path / "semi.csv"
    raw.to_csv(semi, sep=";", index=False)
    one_line_error(run("train", semi, files["lots"], "--config", files["config"], "--out", out),
                   "looks ';'-separated")
    assert list(tmp_path.iterdir()) == [nohead, semi] or not out.exists()


def test_not_a_model_file(files, tmp_path):
    one_line_error(run("inspect", files["ratings"]), "not a usable model file")
    one_line_error(run("score", files["lots"], files["new_lots"], "--out", tmp_path / "s.csv"),
                   "not a usable model file")
    assert not (tmp_path / "s.csv").exists()


def test_unknown_config_key(files, tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[model]\nrnak = 3\n")
    one_line_error(run("train", files["ratings"], files["lots"], "--config", bad, "--out", tmp_path / "m"),
                   "unknown setting 'model.rnak'", "did you mean 'rank'")


def test_declared_column_absent(files, tmp_path):
    lots = pd.read_csv(files["lots"]).drop(columns=["altitude_m"])
    p = tmp_path / "lots.csv"
    lots.to_csv(p, index=False)
    one_line_error(run("train", files["ratings"], p, "--config", files["config"], "--out", tmp_path / "m"),
                   "column 'altitude_m' is declared as number but is not in the file")


def test_new_items_without_known_columns(files, tmp_path):
    p = tmp_path / "new.csv"
    pd.DataFrame({"lot": ["X1"], "colour": ["red"]}).to_csv(p, index=False)
    out = tmp_path / "s.csv"
    one_line_error(run("score", files["model"], p, "--out", out), "none of the model's attribute columns")
    assert not out.exists()


def test_ids_with_spaces_and_mixed_types(files, tmp_path):
    raw = pd.read_csv(files["ratings"], dtype=str)
    raw.loc[5, "member"] = " M00001"
    p = tmp_path / "r.csv"
    raw.to_csv(p, index=False)
    one_line_error(run("train", p, files["lots"], "--config", files["config"], "--out", tmp_path / "m"),
                   "row 7", "column 'member'", "surrounding spaces")
    pq = tmp_path / "r.parquet"
    ids = pd.read_csv(files["ratings"])
    ids["lot"] = ids["lot"].str[1:].astype(float) + 0.5
    ids.to_parquet(pq)
    one_line_error(run("train", pq, files["lots"], "--config", files["config"], "--out", tmp_path / "m"),
                   "column 'lot'", "decimal number")
    # numbers written two ways in two files: ids are text, and the message says so
    num = pd.read_csv(files["ratings"], dtype=str)
    num["lot"] = num["lot"].str.lstrip("L0")
    lots = pd.read_csv(files["lots"], dtype=str)
    lots["lot"] = lots["lot"].str[1:]
    num.to_csv(p, index=False)
    lots.to_csv(tmp_path / "lots.csv", index=False)
    one_line_error(run("train", p, tmp_path / "lots.csv", "--config", files["config"], "--out", tmp_path / "m"),
                   "is rated but has no row", "ids are compared as text")


def test_output_folder_missing(files, tmp_path):
    one_line_error(run("train", files["ratings"], files["lots"], "--config", files["config"],
                       "--out", tmp_path / "no" / "m.hybrid"), "folder", "does not exist")
    one_line_error(run("score", files["model"], files["new_lots"], "--out", tmp_path / "no" / "s.csv"),
                   "does not exist")


def test_unknown_item_and_bad_format(files):
    one_line_error(run("related", files["model"], "NOPE"), "item 'NOPE' is not in the model")
    one_line_error(run("inspect", files["model"], "--format", "xml"), "--format must be one of")


# ---- the campaign analyst's commands --------------------------------------------------

def test_plan_writes_plan_and_asks(files, tmp_path):
    out, asks = tmp_path / "plan.csv", tmp_path / "asks.jsonl"
    result = run("plan", files["model"], "--budget", "60", "--per-user", "2", "--k", "5", "--priority", "margin",
                 "--new-items", files["new_lots"], "--out", out, "--asks", asks, "--format", "json")
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    table = pd.read_csv(out)
    assert len(table) == 80 + 6 and summary["asks"] == sum(1 for _ in asks.open())
    assert summary["no ratings yet"] == (table["ratings"] == 0).sum()
    assert table["planned"].sum() <= 60 and summary["ratings planned"] == table["planned"].sum()
    lines = [json.loads(x) for x in asks.read_text().splitlines()]
    assert pd.DataFrame(lines).groupby("user").size().max() <= 2


def test_plan_only_some_items(files, tmp_path):
    out = tmp_path / "plan.csv"
    result = run("plan", files["model"], "--new-items", files["new_lots"], "--items", files["new_lots"],
                 "--out", out, "--format", "json")
    assert result.exit_code == 0, result.output
    table = pd.read_csv(out)
    new_ids = pd.read_csv(files["new_lots"]).iloc[:, 0].astype(str).tolist()
    assert table["item"].tolist() == new_ids and (table["status"] == "no ratings yet").all()
    listed = tmp_path / "launch.csv"
    listed.write_text("lot\nL0003\nL9999\n")
    one_line_error(run("plan", files["model"], "--items", listed, "--out", tmp_path / "p2.csv"),
                   "item 'L9999' is not in the model")
    assert not (tmp_path / "p2.csv").exists()


def test_plan_help_carries_the_cautions():
    text = run("plan", "--help").stdout
    for phrase in ("personal data", "opt-outs", "data-protection law", "estimate"):
        assert phrase in text


def test_update_folds_in_and_plan_shows_what_is_left(files, tmp_path):
    model2 = tmp_path / "m2.hybrid"
    new = tmp_path / "week1.csv"
    pd.DataFrame({"member": ["M00001", "M00002", "M00003"], "lot": ["L0003", "L0003", "L0004"],
                  "rating": [4.5, 4.0, 2.0]}).to_csv(new, index=False)
    result = run("update", files["model"], new, "--out", model2, "--format", "json")
    assert result.exit_code == 0, result.output
    before, after = hybrid.load(files["model"]), hybrid.load(model2)
    j = list(after.item_ids_).index("L0003")
    assert after.item_counts_[j] >= before.item_counts_[j] + 1
    assert json.loads(result.stdout)["items touched"] == 2
    bad = tmp_path / "bad.csv"
    pd.DataFrame({"member": ["M00001"], "lot": ["NEW"], "rating": [4.0]}).to_csv(bad, index=False)
    one_line_error(run("update", files["model"], bad, "--out", tmp_path / "m3.hybrid"),
                   "item 'NEW' is not in the model")
    assert not (tmp_path / "m3.hybrid").exists()
    # the same week imported again into the updated model: refused, nothing written; a file
    # with one changed answer among the repeats goes in and says what it changed
    one_line_error(run("update", model2, new, "--out", tmp_path / "m4.hybrid"),
                   "all 3 ratings are already in the model with the same values")
    assert not (tmp_path / "m4.hybrid").exists()
    edited = tmp_path / "week1b.csv"
    pd.read_csv(new).assign(rating=[4.5, 4.0, 3.0]).to_csv(edited, index=False)
    result = run("update", model2, edited, "--out", tmp_path / "m5.hybrid", "--format", "json")
    summary = json.loads(result.stdout)
    assert (summary["ratings added"], summary["ratings changed"],
            summary["ratings already in the model (unchanged)"]) == (0, 1, 2)
    assert summary["ratings now"] == summary["ratings before"]


def test_calibrate_prints_the_table(files):
    result = run("calibrate", files["ratings"], files["lots"], "--config", files["config"], "--probes", "10",
                 "--format", "csv")
    assert result.exit_code == 0, result.output
    table = pd.read_csv(pd.io.common.StringIO(result.stdout))
    assert table["n"].tolist() == [0, 2, 5, 10, 20, 40] and (table["items"] <= 10).all()


@pytest.mark.parametrize("flags, fragment", [
    (["--k", "0"], "k must be a whole number >= 1, found 0"),
    (["--k", "-1"], "k must be a whole number >= 1, found -1"),
    (["--budget", "-5"], "budget must be a whole number >= 0"),
    (["--per-item", "-3", "--budget", "10"], "per_item must be"),
    (["--per-user", "0", "--budget", "100"], "per_user must be"),
    (["--target", "nan"], "target must be a fraction in (0, 1]"),
])
def test_plan_refuses_bad_numbers_in_a_real_process(files, tmp_path, flags, fragment):
    # a separate process, so that a crash of compiled code (k = 0 once made the planner's
    # top-k fold write outside its arrays: exit 134 or 139) fails the test instead of the run
    import subprocess
    import sys

    out = tmp_path / "p.csv"
    done = subprocess.run([sys.executable, "-c", "from hybrid.cli import app; app()", "plan", str(files["model"]), *flags,
                           "--out", str(out)], capture_output=True, text=True, timeout=300)
    assert done.returncode == 2, (done.returncode, done.stderr[-500:])
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0] and "Traceback" not in done.stderr, done.stderr
    assert not out.exists()


def test_plan_settings_share_one_rule(fitted):
    # the same rule for the library, the TOML settings and the compiled kernel's guard
    from hybrid.app.config import load_config
    from hybrid.common.errors import InputError
    from hybrid.core.posterior import _full_pool

    with pytest.raises(InputError, match=r"setting 'plan.k' must be a whole number >= 1, found 0"):
        load_config(overrides={"plan": {"k": 0}})
    with pytest.raises(InputError, match="setting 'plan.draws' must be a whole number >= 2, found 1"):
        load_config(overrides={"plan": {"draws": 1}})
    with pytest.raises(ValueError, match="k=0"):
        _full_pool(np.zeros((3, 2)), np.zeros((5, 2)), np.zeros(5), np.zeros((3, 0), int), np.zeros(3, int), 0)
    with pytest.raises(InputError, match="k must be a whole number >= 1, found 0"):
        hybrid.plan(fitted, k=0)
    with pytest.raises(InputError, match="setting 'score.liked' must be a number, found nan"):
        load_config(overrides={"score": {"liked": float("nan")}})
    from hybrid.estimator.batch import score_items
    with pytest.raises(InputError, match="liked must be a number, found nan"):
        next(score_items(fitted, fitted.item_table_.head(2), liked=float("nan")))


def test_version_flag_and_command():
    for args in (["--version"], ["version"]):
        result = run(*args)
        assert result.exit_code == 0 and result.stdout.strip() == hybrid.__version__, result.output


def test_the_file_ending_picks_the_format(files, tmp_path):
    # Parquet read back by pyarrow equals the CSV, a .json file is one JSON array equal to the
    # JSON Lines, both streamed chunk by chunk; an unknown ending fails before any work
    outs = {e: tmp_path / f"s.{e}" for e in ("csv", "parquet", "json", "jsonl")}
    for path in outs.values():
        assert run("score", files["model"], files["new_lots"], "--out", path, "--chunk", "4").exit_code == 0
    csv, parquet = pd.read_csv(outs["csv"]), pd.read_parquet(outs["parquet"])
    assert list(parquet.columns) == list(csv.columns) and len(parquet) == 6
    assert np.allclose(parquet["expected_rating"], csv["expected_rating"], atol=1e-5)
    array = json.loads(outs["json"].read_text())
    assert array == [json.loads(line) for line in outs["jsonl"].read_text().splitlines()]
    bad = tmp_path / "s.xlsx"
    one_line_error(run("score", files["model"], files["new_lots"], "--out", bad), "unknown file ending '.xlsx'")
    assert not bad.exists()
    plan = tmp_path / "plan.parquet"
    result = run("plan", files["model"], "--out", plan, "--k", "5", "--format", "json")
    assert result.exit_code == 0, result.output
    assert pd.read_parquet(plan)["item"].nunique() == len(hybrid.load(files["model"]).item_ids_)
    report = tmp_path / "r.html"
    assert run("report", files["model"], "--plan", plan, "--out", report).exit_code == 0
    one_line_error(run("report", files["model"], "--out", tmp_path / "r.pdf"), "write .html or .htm")


def test_an_id_in_the_wrong_case_gets_the_right_one_suggested(files):
    line = one_line_error(run("related", files["model"], "l0003"), "is not in the model")
    assert "(did you mean 'L0003'?)" in line
    line = one_line_error(run("related", files["model"], "Z9"), "is not in the model")
    assert "did you mean" not in line and "--new-items" in line


def test_report_refuses_a_plan_from_another_model_and_states_the_plans_settings(files, tmp_path):
    plan_file, html_file = tmp_path / "plan.json", tmp_path / "r.html"
    assert run("plan", files["model"], "--target", "0.6", "--k", "5", "--budget", "30",
               "--out", plan_file).exit_code == 0
    assert run("report", files["model"], "--plan", plan_file, "--out", html_file).exit_code == 0
    m = hybrid.load(files["model"])
    page = html_file.read_text()
    assert (f"Plan made for a stability target of 0.6 with neighbour lists of 5, a budget of 30 ratings; "
            f"model fingerprint {m.fingerprint_}.") in page
    # the same model after an update is another model for the plan's numbers
    week = tmp_path / "w.csv"
    pd.DataFrame({"member": ["M00001"], "lot": ["L0005"], "rating": [1.0]}).to_csv(week, index=False)
    other = tmp_path / "m2.hybrid"
    assert run("update", files["model"], week, "--out", other).exit_code == 0
    one_line_error(run("report", other, "--plan", plan_file, "--out", tmp_path / "r2.html"),
                   "the plan was made from another model")
    assert not (tmp_path / "r2.html").exists()
    assert hybrid.load(other).fingerprint_ != m.fingerprint_ == hybrid.load(files["model"]).fingerprint_


def test_report_without_a_plan_plans_exactly_as_plan_does(files, tmp_path, monkeypatch):
    import hybrid.planning.planner as planner

    cfg = tmp_path / "odd.toml"   # every plan setting away from its default
    assert "[plan]" not in files["config"].read_text()
    cfg.write_text(files["config"].read_text() + '\n[plan]\nmax_needed = 80\naim = "gain"\nresponders = "likely"\n'
                   'candidate_min_ratings = 12\ndraws = 24\nk = 6\ntarget = 0.7\n')
    calls, real = [], planner.plan
    monkeypatch.setattr(planner, "plan", lambda model, **kw: calls.append(kw) or real(model, **kw))
    assert run("plan", files["model"], "--config", cfg, "--out", tmp_path / "p.csv").exit_code == 0
    assert run("report", files["model"], "--config", cfg, "--out", tmp_path / "r.html").exit_code == 0
    by_plan, by_report = ({k: v for k, v in c.items() if v is not None and k != "client"} for c in calls)
    assert by_plan == by_report
    assert by_plan["max_needed"] == 80 and by_plan["responders"] == "likely" and by_plan["candidate_min_ratings"] == 12
