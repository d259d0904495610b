"""Scoring follows the file: an unrated item is projected from the row given, an edited rated
item is scored from its fitted vector and flagged (invented club data)."""
import pandas as pd
import pytest
from typer.testing import CliRunner

from hybrid import HybridFactorModel
from hybrid.cli import app
from hybrid.datasets.club import tasting_club, write_samples
from hybrid.estimator.batch import score_items


@pytest.fixture(scope="module")
def club_model():
    club = tasting_club(n_members=500, n_lots=100, n_new=6, seed=21)
    model = HybridFactorModel(rank=4, epochs=10, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    model.add_items(club.new_lots)   # the new lots join with their projections, as in the demo
    return club, model


def _score(model, rows):
    return pd.concat(score_items(model, rows, audience=3, neighbours=3)).set_index("item")


def test_an_edited_unrated_item_scores_as_edited_and_as_the_same_row_under_a_new_id(club_model):
    club, model = club_model
    lot = club.new_lots.index[0]
    edited = club.new_lots.loc[[lot]].copy()
    edited["price"] = edited["price"] * 1.6
    edited["process"] = "anaerobic" if edited["process"].iloc[0] != "anaerobic" else "washed"
    before = _score(model, club.new_lots.loc[[lot]]).loc[lot]
    after = _score(model, edited).loc[lot]
    fresh = _score(model, edited.rename(index={lot: "FRESH-ID"})).loc["FRESH-ID"]
    assert after["expected_rating"] != pytest.approx(before["expected_rating"], abs=1e-6)
    assert after["expected_rating"] == pytest.approx(fresh["expected_rating"], abs=1e-12)
    assert after["attributes_changed"] and not before["attributes_changed"] and not fresh["attributes_changed"]
    # the unedited row scores exactly as the block the model holds for it
    held = model.predict(model.user_ids_[:5], [lot] * 5)
    assert model.predict(model.user_ids_[:5], [lot] * 5, attributes=club.new_lots) == pytest.approx(held, abs=1e-12)


def test_an_edited_rated_item_keeps_its_fitted_score_and_is_flagged(club_model, tmp_path):
    club, model = club_model
    rated = club.ratings["item"].value_counts().index[0]
    row = club.lots.loc[[rated]].copy()
    row["price"] = row["price"] * 3
    same, edited = _score(model, club.lots.loc[[rated]]).loc[rated], _score(model, row).loc[rated]
    assert edited["expected_rating"] == same["expected_rating"]
    assert edited["attributes_changed"] and not same["attributes_changed"] and not edited["content_only"]
    # on the command line: one note with the count
    paths = write_samples(tmp_path, club)
    model.save(tmp_path / "m.hybrid")
    lots = pd.read_csv(paths["lots"], dtype={"lot": str})
    lots.loc[lots["lot"] == rated, "price"] *= 3
    lots.to_csv(tmp_path / "edited.csv", index=False)
    cfg = tmp_path / "c.toml"
    cfg.write_text(open("configs/coffee.toml").read())
    done = CliRunner().invoke(app, ["score", str(tmp_path / "m.hybrid"), str(tmp_path / "edited.csv"),
                                    "--config", str(cfg), "--out", str(tmp_path / "s.csv")])
    assert done.exit_code == 0, done.output
    notes = [line for line in done.stderr.splitlines() if line.startswith("note: ")]
    edited_note = [line for line in notes if "have ratings in the model" in line]
    assert len(edited_note) == 1 and edited_note[0].startswith("note: 1 lot(s) have ratings in the model")   # the club says lots
    assert any("column 'price': 1 lot(s) outside the training range" in line for line in notes)   # x3
    out = pd.read_csv(tmp_path / "s.csv", dtype={"item": str}).set_index("item")
    assert bool(out.loc[rated, "attributes_changed"]) and int(out["attributes_changed"].sum()) == 1


def test_what_looks_odd_is_said_once_per_kind_and_per_item(club_model):
    from hybrid.estimator.oddities import OddInputWarning

    club, model = club_model
    rows = club.new_lots.iloc[:4].copy()
    known_region = club.lots["region"].iloc[0]
    rows.iloc[0, rows.columns.get_loc("region")] = known_region.upper()      # another case
    rows.iloc[1, rows.columns.get_loc("process")] = "carbonic maceration"   # never seen
    rows.iloc[2, rows.columns.get_loc("price")] = club.lots["price"].max() * 5
    rows.iloc[3, rows.columns.get_loc("notes")] = "zzyzx qwerty"            # no known word
    rows = rows.drop(columns=["altitude_m"])
    with pytest.warns(OddInputWarning) as seen:
        out = _score(model, rows)
    lines = [str(w.message) for w in seen]
    assert len(lines) == 5, lines   # one per kind and column
    assert any(line.startswith("column 'altitude_m' (number) is missing") for line in lines)
    assert any(f"did you mean '{known_region}'?" in line for line in lines)
    assert any("column 'process': 1 item(s) with values never seen" in line for line in lines)
    assert any("column 'price': 1 item(s) outside the training range" in line for line in lines)
    assert any("column 'notes': 1 item(s) whose text has no word" in line for line in lines)
    w = out["warnings"].tolist()
    assert all("no altitude_m" in x for x in w)
    assert "region" in w[0] and "process 'carbonic maceration'" in w[1] and "price" in w[2] and "notes" in w[3]


def test_numbers_beyond_the_training_range_are_held_to_it(club_model):
    club, model = club_model
    top = club.lots["price"].max()
    row = club.new_lots.iloc[[0]].copy()
    at_top, far = row.assign(price=top), row.assign(price=top * 5)
    with pytest.warns(UserWarning):
        clipped = pd.concat(score_items(model, far, audience=1, neighbours=1))["expected_rating"].iloc[0]
        free = pd.concat(score_items(model, far, audience=1, neighbours=1, clip_numbers=False))
    edge = pd.concat(score_items(model, at_top, audience=1, neighbours=1))["expected_rating"].iloc[0]
    assert clipped == pytest.approx(edge, abs=1e-12)
    assert free["expected_rating"].iloc[0] != pytest.approx(edge, abs=1e-6)
    assert "outside the training range" in free["warnings"].iloc[0]


def test_the_screen_shows_the_best_of_the_whole_file_not_of_its_first_chunk(club_model, tmp_path):
    import io

    club, model = club_model
    model.save(tmp_path / "m.hybrid")
    paths = write_samples(tmp_path, club)
    cfg = tmp_path / "c.toml"
    cfg.write_text(open("configs/coffee.toml").read())
    done = CliRunner().invoke(app, ["score", str(tmp_path / "m.hybrid"), str(paths["new_lots"]), "--config", str(cfg),
                                    "--out", str(tmp_path / "s.csv"), "--chunk", "2", "--format", "csv"])
    assert done.exit_code == 0, done.output
    shown = pd.read_csv(io.StringIO(done.stdout), dtype={"item": str})
    scores = pd.read_csv(tmp_path / "s.csv", dtype={"item": str})
    best = scores.nlargest(len(shown), "expected_rating")["item"].tolist()
    assert len(shown) == min(10, len(scores)) and shown["item"].tolist() == best
    assert set(best) - set(scores["item"].iloc[:2])   # some of them beyond the first chunk
