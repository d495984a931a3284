"""The selection of rows (--limit, --shuffle-seed, --shard) and the Dataset (onnxcal/data/spec.py)."""

import numpy as np
import pytest
from conftest import DEMO_VAL
from data_helpers import DEMO_SPEC, load, write

from onnxcal.data import Dataset, Selection, parse_shard, selected_rows
from onnxcal.errors import OnnxcalError
from onnxcal.graph import TensorSpec


def all_rows(ds):
    return ds.batch(0, ds.n, {k: None for k in ds.inputs})


def test_in_memory_dataset_still_works():
    ds = Dataset({"x": np.zeros((4, 3), np.float32)}, np.array([0, 1, 2, 0]), "mem")
    assert ds.n == ds.total == 4 and ds.row_numbers().tolist() == [0, 1, 2, 3]


def test_release_keeps_the_data(tmp_path):
    x = np.random.default_rng(1).normal(size=(3000, 64)).astype(np.float32)
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "y.npy", np.zeros(3000, np.int64))
    ds = load([TensorSpec("x", "float32", ("N", 64))], path=tmp_path / "x.npy", labels=tmp_path / "y.npy")
    first = ds.batch(0, 1000, {"x": "float32"})["x"].copy()
    ds.release(0, 1000)  # pages are dropped from this process, not changed
    np.testing.assert_array_equal(ds.batch(0, 1000, {"x": "float32"})["x"], first)
    np.testing.assert_array_equal(ds.batch(0, 3000, {"x": "float32"})["x"], x)


# --------------------------------------------------------------------------
# Selection


def test_shards_partition_the_rows():
    for total in (10, 11, 1000):
        for seed in (None, 3):
            parts = [selected_rows(total, Selection(shuffle_seed=seed, shard=(i, 4))) for i in range(1, 5)]
            joined = np.concatenate(parts)
            assert sorted(joined.tolist()) == list(range(total))  # disjoint and complete
            assert max(map(len, parts)) - min(map(len, parts)) <= 1
            assert all((np.diff(p) > 0).all() for p in parts)  # each read front to back
    assert selected_rows(10, Selection(shuffle_seed=3)) is None  # shuffling alone keeps all


def test_limit_and_shuffle_seed():
    assert selected_rows(100, Selection(limit=5)).tolist() == [0, 1, 2, 3, 4]
    a = selected_rows(100, Selection(limit=5, shuffle_seed=7))
    assert a.tolist() == selected_rows(100, Selection(limit=5, shuffle_seed=7)).tolist()
    assert a.tolist() != selected_rows(100, Selection(limit=5, shuffle_seed=8)).tolist()
    ds = load(DEMO_SPEC, path=DEMO_VAL, selection=Selection(limit=5, shuffle_seed=7))
    val = np.load(DEMO_VAL)
    np.testing.assert_array_equal(all_rows(ds)["band_energies"], val["band_energies"][ds.rows])
    np.testing.assert_array_equal(ds.labels, val["labels"][ds.rows])


@pytest.mark.parametrize(
    "text, message",
    [("2", "not of the form I/N"), ("0/4", "shards are numbered 1 to N"), ("5/4", "out of range"), ("a/b",
                                                                                                    "not of the form")],
)
def test_parse_shard_errors(text, message):
    with pytest.raises(OnnxcalError, match=message):
        parse_shard(text)


def test_selection_errors(tmp_path):
    with pytest.raises(OnnxcalError, match="shard 1/3 of .* holds no rows .the set has 2"):
        load(path=write(tmp_path, x=np.zeros((2, 3)), labels=np.array([0, 1])), selection=Selection(shard=(1, 3)))
    with pytest.raises(OnnxcalError, match="--limit 0 is out of range: give a number of samples of at least 1"):
        load(path=DEMO_VAL, selection=Selection(limit=0))
