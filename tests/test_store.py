"""The model file: no pickle, a version and checksums, atomic writes."""
import json
import zipfile

import numpy as np
import pytest

import hybrid
from hybrid.common.errors import InputError
from hybrid.io.store import read_manifest


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


def _rewrite(src, dst, change_manifest=None, members=None):
    """Copy a model file, editing its manifest and/or replacing members."""
    with zipfile.ZipFile(src) as zin, zipfile.ZipFile(dst, "w", zipfile.ZIP_DEFLATED) as zout:
        for info in zin.infolist():
            data = zin.read(info.filename)
            if info.filename == "manifest.json" and change_manifest:
                m = json.loads(data)
                change_manifest(m)
                data = json.dumps(m).encode()
            if members and info.filename in members:
                data = members.pop(info.filename)
            zout.writestr(info.filename, data)
        for name, data in (members or {}).items():
            zout.writestr(name, data)


def _refused(path):
    with pytest.raises(InputError) as err:
        hybrid.load(path)
    line = str(err.value)
    assert "\n" not in line and "not a usable model file" in line or "not found" in line, line
    return line


def test_truncated_and_flipped_files_are_refused_in_one_line(saved, tmp_path):
    # truncation at 40 offsets and 40 single-byte flips (seeded): every one is refused with one
    # line, or (a flip inside slack the format never reads) loads the very same model
    raw = saved.read_bytes()
    want = hybrid.load(saved).item_blocks_
    rng = np.random.default_rng(0)
    refused = same = 0
    for cut in np.linspace(0, len(raw) - 1, 40).astype(int):
        bad = tmp_path / "cut.hybrid"
        bad.write_bytes(raw[:cut])
        _refused(bad)
        refused += 1
    for where in rng.integers(0, len(raw), 40):
        flipped = bytearray(raw)
        flipped[where] ^= 0xFF
        bad = tmp_path / "flip.hybrid"
        bad.write_bytes(bytes(flipped))
        try:
            again = hybrid.load(bad)
        except InputError as exc:
            assert "\n" not in str(exc)
            refused += 1
        else:
            assert np.array_equal(again.item_blocks_, want)
            same += 1
    assert refused + same == 80 and refused >= 60, (refused, same)


@pytest.mark.parametrize("edit, fragment", [
    (lambda m: m.pop("arrays"), "no table of arrays"),
    (lambda m: m.update(arrays=[1, 2]), "no table of arrays"),
    (lambda m: m["arrays"]["item_blocks"].pop("sha256"), "malformed"),
    (lambda m: m["arrays"]["item_blocks"].update(dtype="O"), "malformed"),
    (lambda m: m["arrays"]["item_blocks"].update(shape=[1, 1]), "more than its shape holds"),
    (lambda m: m["arrays"].update({"../../etc/passwd": m["arrays"]["map"]}), "malformed"),
    (lambda m: m.pop("features"), "lacks or mistypes an entry ('features')"),
    (lambda m: m.update(mu="high"), "lacks or mistypes an entry"),
    (lambda m: m["params"].update(colour="blue"), "params.colour"),
])
def test_manifests_that_are_not_what_they_seem(saved, tmp_path, edit, fragment):
    bad = tmp_path / "bad.hybrid"
    _rewrite(saved, bad, change_manifest=edit)
    assert fragment in _refused(bad)


def test_a_decompression_bomb_is_refused_before_it_is_inflated(saved, tmp_path):
    # a member that inflates to 200 MB (zeros compress about 1000 to 1) under a manifest that
    # declares it as a huge array: refused on the declared sizes, nothing inflated
    import tracemalloc

    def huge(m):
        m["arrays"]["map"].update(shape=[5120, 5120], dtype="<f8")
    bad = tmp_path / "bomb.hybrid"
    _rewrite(saved, bad, change_manifest=huge, members={"arrays/map.npy": b"\0" * (200 << 20)})
    assert bad.stat().st_size < (2 << 20)
    tracemalloc.start()
    line = _refused(bad)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert "times the file" in line and peak < 20 * bad.stat().st_size + (8 << 20), peak
