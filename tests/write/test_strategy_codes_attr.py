"""The strategy column describes its own codes (attribute ``codes``), sealed and verified.

Sets written before the attribute (no column attributes) still verify. The attribute is plain
JSON text on an HDF5 attribute, read here with h5py and the standard ``json`` module.
"""

import json
import shutil

import h5py
import pytest

from goalkit.demo import make_demo
from goalkit.pipeline.build import build
from goalkit.pipeline.recipe import load_recipe
from goalkit.write.seal import write_seal
from goalkit.write.verify import verify_set

SHIPPED = {"0": "original", "1": "final", "2": "future", "3": "episode", "4": "geometric",
           "5": "other_episode", "6": "neighbour", "7": "library", "8": "near_miss"}


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    d = tmp_path_factory.mktemp("codes")
    make_demo(d, episodes=12, seed=4)
    return build(load_recipe(d / "gantry-recipe.toml")).path


def _edit(path, tmp_path, change, seal=True):
    copy = tmp_path / "copy.h5"
    shutil.copy(path, copy)
    with h5py.File(copy, "r+") as f:
        change(f["train"]["strategy"].attrs)
        if seal:
            write_seal(f)
    return copy


def test_every_split_stores_the_code_table(built):
    with h5py.File(built, "r") as f:
        for split in ("train", "validation"):
            attrs = f[split]["strategy"].attrs
            assert list(attrs) == ["codes"]
            assert json.loads(attrs["codes"]) == SHIPPED
            assert all(len(f[split][n].attrs) == 0 for n in f[split] if n != "strategy")
        assert f.attrs["format_version"] == 2


def test_a_renamed_code_is_reported(built, tmp_path):
    renamed = dict(SHIPPED, **{"2": "later"})
    copy = _edit(built, tmp_path, lambda a: a.__setitem__("codes", json.dumps(renamed)))
    report = verify_set(copy, audit=False)
    assert not report.ok
    assert any("train/strategy: attribute codes names code 2 'later'" in m for m in report.failures), report.failures


def test_the_attribute_is_sealed(built, tmp_path):
    copy = _edit(built, tmp_path, lambda a: a.__setitem__("codes", json.dumps(SHIPPED, indent=1)), seal=False)
    report = verify_set(copy, audit=False)
    assert not report.ok and any("seal" in m for m in report.failures), report.failures


def test_malformed_and_extra_attributes_are_reported(built, tmp_path):
    copy = _edit(built, tmp_path, lambda a: a.__setitem__("codes", "[1, 2]"))
    report = verify_set(copy, audit=False)
    assert any("train/strategy: attribute codes: expected JSON text" in m for m in report.failures), report.failures
    copy = _edit(built, tmp_path, lambda a: a.__setitem__("units", "none"))
    report = verify_set(copy, audit=False)
    assert any("train/strategy: attributes not part of a set: units" in m for m in report.failures), report.failures


def test_a_set_without_the_attribute_still_verifies(built, tmp_path):
    # what a set written before the attribute looks like (resealed, as its writer sealed it)
    def strip(f):
        for split in ("train", "validation"):
            del f[split]["strategy"].attrs["codes"]
        write_seal(f)

    copy = tmp_path / "old.h5"
    shutil.copy(built, copy)
    with h5py.File(copy, "r+") as f:
        strip(f)
    report = verify_set(copy)
    assert report.ok, report.failures
