"""The data contract: every bad input gets one precise error."""
import pandas as pd
import pytest

from hybrid.app.config import load_config
from hybrid.common.errors import InputError
from hybrid.io.tables import read_attributes, read_ratings, validate_ratings

CFG = load_config(overrides={"ratings": {"user": "member", "item": "lot", "rating": "score"},
                             "attributes": {"id": "lot", "columns": {"notes": "text", "price": "number"}}})
SCHEMA = {"notes": {"type": "text", "weight": 1.0}, "price": {"type": "number", "weight": 1.0}}


def write(tmp_path, name, content, mode="w"):
    p = tmp_path / name
    if isinstance(content, bytes):
        p.write_bytes(content)
    else:
        p.write_text(content)
    return p


def ratings_error(tmp_path, text, cfg=CFG):
    with pytest.raises(InputError) as err:
        read_ratings(write(tmp_path, "r.csv", text), cfg)
    return str(err.value)


def test_reads_ids_as_text(tmp_path):
    df = read_ratings(write(tmp_path, "r.csv", "member,lot,score\n007,12,4.5\n7,12,3\n"), CFG)
    assert df["user"].tolist() == ["007", "7"]
    assert df["rating"].tolist() == [4.5, 3.0]


def test_missing_column(tmp_path):
    msg = ratings_error(tmp_path, "member,lot,stars\na,b,4\n")
    assert "missing column 'score'" in msg and "found columns member, lot, stars" in msg


def test_empty_file_and_header_only(tmp_path):
    assert "empty" in ratings_error(tmp_path, "")
    assert "no rows" in ratings_error(tmp_path, "member,lot,score\n")


def test_non_numeric_and_nan_rating(tmp_path):
    msg = ratings_error(tmp_path, "member,lot,score\na,b,4\nc,d,five\n")
    assert msg.endswith("row 3: column 'score': expected a number, found 'five'")
    assert "found 'nan'" in ratings_error(tmp_path, "member,lot,score\na,b,nan\n")
    assert "found ''" in ratings_error(tmp_path, "member,lot,score\na,b,\n")


def test_rating_outside_scale(tmp_path):
    msg = ratings_error(tmp_path, "member,lot,score\na,b,4\na,c,6\n")
    assert "row 3" in msg and "between 1 and 5, found 6" in msg


def test_duplicate_policy(tmp_path):
    text = "member,lot,score\na,b,4\na,b,2\n"
    assert "second for ('a', 'b')" in ratings_error(tmp_path, text)
    cfg = load_config(overrides={"ratings": {**CFG["ratings"], "duplicates": "last"}})
    df = read_ratings(write(tmp_path, "r.csv", text), cfg)
    assert df["rating"].tolist() == [2.0]


def test_undecodable_bytes(tmp_path):
    msg = ratings_error(tmp_path, b"member,lot,score\na,b,4\nc,\xff\xfe,3\n")
    assert "row 3: column 'lot': expected UTF-8 text, found undecodable byte 0xff" in msg


def test_ids_with_spaces(tmp_path):
    assert "' a' with surrounding spaces" in ratings_error(tmp_path, "member,lot,score\n a,b,4\n")


def test_no_header_and_wrong_delimiter(tmp_path):
    assert "no header line" in ratings_error(tmp_path, "1,2,4\n3,4,5\n")
    assert "looks ';'-separated" in ratings_error(tmp_path, "member;lot;score\na;b;4\n")


def test_parquet_mixed_and_decimal_ids(tmp_path):
    p = tmp_path / "r.parquet"
    pd.DataFrame({"member": [1.5, 2.0], "lot": ["a", "b"], "score": [4.0, 3.0]}).to_parquet(p)
    with pytest.raises(InputError, match="decimal number 1.5"):
        read_ratings(p, CFG)
    pd.DataFrame({"member": [1, 2], "lot": ["a", "b"], "score": [4.0, 3.0]}).to_parquet(p)
    assert read_ratings(p, CFG)["user"].tolist() == ["1", "2"]
    mixed = pd.DataFrame({"m": pd.Series([1, "x"], dtype=object), "l": ["a", "b"], "s": [4, 3]})
    with pytest.raises(InputError, match=r"row 2: column 'm': expected ids of one type, found mixed types \(int and str\)"):
        validate_ratings(mixed, {"user": "m", "item": "l", "rating": "s"})


def test_attribute_errors(tmp_path):
    p = write(tmp_path, "a.csv", "lot,notes\nx,cocoa\n")
    with pytest.raises(InputError, match="column 'price' is declared as number but is not in the file"):
        read_attributes(p, CFG, SCHEMA)
    p = write(tmp_path, "a.csv", "lot,notes,price\nx,cocoa,12\nx,plum,9\n")
    with pytest.raises(InputError, match="row 3: column 'lot': expected one row per item"):
        read_attributes(p, CFG, SCHEMA)
    p = write(tmp_path, "a.csv", "lot,notes,price\nx,cocoa,cheap\n")
    with pytest.raises(InputError, match="row 2: column 'price': expected a number, found 'cheap'"):
        read_attributes(p, CFG, SCHEMA)
    p = write(tmp_path, "a.csv", "lot,notes,price\nx,cocoa,\n")
    assert read_attributes(p, CFG, SCHEMA).index.tolist() == ["x"]  # a missing number is imputed


def test_unknown_attribute_type_and_setting(tmp_path):
    bad = write(tmp_path, "c.toml", '[attributes.columns]\nnotes = "texts"\n')
    with pytest.raises(InputError, match="unknown attribute type 'texts'.*did you mean 'text'"):
        load_config(bad)
    bad = write(tmp_path, "c.toml", "[model]\nrnak = 4\n")
    with pytest.raises(InputError, match="unknown setting 'model.rnak' \\(did you mean 'rank'\\?\\)"):
        load_config(bad)


def test_rated_item_without_attributes(club):
    from hybrid import HybridFactorModel
    with pytest.raises(InputError, match="is rated but has no row in the attribute table"):
        HybridFactorModel(rank=2, epochs=1, schema=club.schema).fit(club.ratings, club.lots.iloc[1:])
