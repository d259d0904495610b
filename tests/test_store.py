"""The model file: no pickle, a version and checksums, atomic writes."""
import json
import zipfile

import numpy as np
import pytest

import hybrid
from hybrid.errors import InputError
from hybrid.store import read_manifest


@pytest.fixture()
def saved(fitted, tmp_path):
    path = tmp_path / "club.hybrid"
    fitted.save(path)
    return path


def test_round_trip_predicts_and_transforms_identically(fitted, saved, club):
    again = hybrid.load(saved)
    users = np.repeat(fitted.user_ids_[:3], 4)
    items = np.tile(club.new_lots.index[:4], 3)
    assert np.array_equal(again.predict(users, items, club.new_lots),
                          fitted.predict(users, items, club.new_lots))
    assert (again.features_.transform(club.new_lots) != fitted.features_.transform(club.new_lots)).nnz == 0
    assert again.get_params() == fitted.get_params()
    assert again.metrics_ == fitted.metrics_


def test_manifest_is_json_with_version_and_checksums(saved):
    with zipfile.ZipFile(saved) as zf:
        manifest = json.loads(zf.read("manifest.json"))
        names = zf.namelist()
    assert manifest["format"] == "hybrid-model" and manifest["format_version"] == 4
    assert all(n == "manifest.json" or n.endswith(".npy") for n in names)
    assert len(manifest["checksum"]) == 64
    for meta in manifest["arrays"].values():
        assert len(meta["sha256"]) == 64 and meta["dtype"] != "object"


def test_truncated_file(saved, tmp_path):
    cut = tmp_path / "cut.hybrid"
    cut.write_bytes(saved.read_bytes()[: saved.stat().st_size // 2])
    with pytest.raises(InputError, match="not a usable model file"):
        hybrid.load(cut)


def test_altered_array_fails_its_checksum(saved, tmp_path):
    bad = tmp_path / "bad.hybrid"
    with zipfile.ZipFile(saved) as src, zipfile.ZipFile(bad, "w") as dst:
        for name in src.namelist():
            data = src.read(name)
            if name == "arrays/map.npy":
                data = data[:-8] + np.float64(123.0).tobytes()
            dst.writestr(name, data)
    with pytest.raises(InputError, match="array 'map' does not match its checksum"):
        hybrid.load(bad)


def test_wrong_version_and_foreign_files(saved, tmp_path):
    other = tmp_path / "v9.hybrid"
    with zipfile.ZipFile(saved) as src, zipfile.ZipFile(other, "w") as dst:
        for name in src.namelist():
            data = src.read(name)
            if name == "manifest.json":
                m = json.loads(data)
                m["format_version"] = 9
                data = json.dumps(m)
            dst.writestr(name, data)
    with pytest.raises(InputError, match="format version 9; this hybrid reads versions 1, 2"):
        hybrid.load(other)
    csv = tmp_path / "ratings.csv"
    csv.write_text("user,item,rating\n")
    with pytest.raises(InputError, match="it is not a hybrid model"):
        hybrid.load(csv)
    z = tmp_path / "other.zip"
    with zipfile.ZipFile(z, "w") as zf:
        zf.writestr("hello.txt", "hi")
    with pytest.raises(InputError, match="no manifest"):
        read_manifest(z)


def test_failed_save_leaves_nothing(fitted, tmp_path, monkeypatch):
    target = tmp_path / "m.hybrid"

    def boom(*a, **k):
        raise RuntimeError("disk full")

    monkeypatch.setattr(np, "save", boom)
    with pytest.raises(RuntimeError):
        fitted.save(target)
    assert list(tmp_path.iterdir()) == []
    with pytest.raises(InputError, match="folder .* does not exist"):
        fitted.save(tmp_path / "nowhere" / "m.hybrid")


def test_version_one_files_read_as_fitted_without_the_launch_offset(fitted, saved, tmp_path, club):
    old = tmp_path / "v1.hybrid"
    with zipfile.ZipFile(saved) as src, zipfile.ZipFile(old, "w") as dst:
        for name in src.namelist():
            data = src.read(name)
            if name == "arrays/launched.npy":
                continue
            if name == "manifest.json":
                m = json.loads(data)
                m["format_version"] = 1
                del m["launch_offset"], m["arrays"]["launched"]
                data = json.dumps(m)
            dst.writestr(name, data)
    model = hybrid.load(old)
    assert model.launch_offset_ == 0.0 and fitted.launch_offset_ != 0.0
    assert np.array_equal(model.launched_, fitted.item_counts_ == 0)
    new = club.new_lots.iloc[:2]
    assert np.allclose(model.project(new).to_numpy(), model.features_.transform(new) @ model.map_)
