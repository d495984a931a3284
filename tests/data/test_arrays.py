"""An .npz of arrays, one .npy per input (onnxcal/data/arrays.py)."""

import numpy as np
import pytest
from conftest import TICKETS, TICKETS_LABELS
from data_helpers import SPEC, TICKET_SPECS, load, write

from onnxcal.data import load_npz, match_inputs
from onnxcal.errors import OnnxcalError

# --------------------------------------------------------------------------
# .npz


def test_load_npz(tmp_path):
    x = np.arange(12, dtype=np.float32).reshape(4, 3)
    ds = load_npz(write(tmp_path, x=x, labels=np.array([0, 1, 2, 0])))
    assert ds.n == 4 and list(ds.inputs) == ["x"]
    np.testing.assert_array_equal(ds.inputs["x"], x)
    match_inputs(ds, SPEC)


def test_uncompressed_npz_members_are_memory_mapped(tmp_path):
    x = np.random.default_rng(0).normal(size=(50, 3)).astype(np.float32)
    ds = load_npz(write(tmp_path, x=x, labels=np.zeros(50, np.int64)))
    assert isinstance(ds.inputs["x"], np.memmap)  # read in place, not copied
    np.testing.assert_array_equal(ds.inputs["x"], x)
    np.savez_compressed(tmp_path / "c.npz", x=x, labels=np.zeros(50, np.int64))
    packed = load_npz(tmp_path / "c.npz")
    assert not isinstance(packed.inputs["x"], np.memmap)  # deflated: read by numpy
    np.testing.assert_array_equal(packed.inputs["x"], x)


def test_missing_labels(tmp_path):
    with pytest.raises(OnnxcalError, match="no array named 'labels'"):
        load_npz(write(tmp_path, x=np.zeros((2, 3))))
    assert load_npz(write(tmp_path, x=np.zeros((2, 3))), require_labels=False).labels is None


def test_object_arrays_are_refused(tmp_path):
    path = tmp_path / "evil.npz"
    np.savez(path, x=np.array([{"a": 1}, None], dtype=object), labels=np.array([0, 1]))
    with pytest.raises(OnnxcalError, match="Python objects.*will not unpickle"):
        load_npz(path)
    np.save(tmp_path / "evil.npy", np.array([{"a": 1}, None], dtype=object))
    with pytest.raises(OnnxcalError, match="input 'x' .*Python objects"):
        load(inputs={"x": tmp_path / "evil.npy"}, labels=TICKETS_LABELS)


def test_not_an_npz(tmp_path):
    path = tmp_path / "x.npz"
    path.write_text("a,b\n1,2\n")
    with pytest.raises(OnnxcalError, match="not an .npz archive"):
        load_npz(path)


def test_length_mismatch(tmp_path):
    with pytest.raises(OnnxcalError, match="different numbers of samples.*x: 3.*labels: 2"):
        load_npz(write(tmp_path, x=np.zeros((3, 3)), labels=np.array([0, 1])))


def test_empty_set(tmp_path):
    with pytest.raises(OnnxcalError, match="no samples"):
        load_npz(write(tmp_path, x=np.zeros((0, 3)), labels=np.zeros(0, np.int64)))


# --------------------------------------------------------------------------
# one .npy per input


def test_npy_per_input_is_memory_mapped():
    ds = load(TICKET_SPECS, inputs=TICKETS, labels=TICKETS_LABELS)
    assert all(isinstance(a, np.memmap) for a in ds.inputs.values())
    assert isinstance(ds.inputs["input_ids"], np.memmap)
    np.testing.assert_array_equal(ds.inputs["attention_mask"], np.load(TICKETS["attention_mask"]))
    np.testing.assert_array_equal(ds.labels, np.load(TICKETS_LABELS))
    assert ds.n == 300


def test_npy_inputs_missing_extra_and_labels(tmp_path):
    with pytest.raises(OnnxcalError, match="no array for model input 'attention_mask'"):
        load(TICKET_SPECS, inputs={"input_ids": TICKETS["input_ids"]}, labels=TICKETS_LABELS)
    extra = dict(TICKETS, token_type_ids=TICKETS["attention_mask"])
    with pytest.raises(OnnxcalError, match="'token_type_ids' that is not a model input"):
        load(TICKET_SPECS, inputs=extra, labels=TICKETS_LABELS)
    with pytest.raises(OnnxcalError, match="pass --labels FILE.npy"):
        load(TICKET_SPECS, inputs=TICKETS)
    assert load(TICKET_SPECS, inputs=TICKETS, require_labels=False).labels is None
    short = tmp_path / "short.npy"
    np.save(short, np.zeros(299, np.int64))
    with pytest.raises(OnnxcalError, match="different numbers of samples.*labels: 299"):
        load(TICKET_SPECS, inputs=TICKETS, labels=short)


# -- damaged archives: what the fuzzer (tests/fuzz) found, each now a clean OnnxcalError --


def _demo_npz(path):
    np.savez(path, x=np.arange(12, dtype=np.float32).reshape(4, 3), labels=np.array([0, 1, 2, 0]))
    return path


def _damage(path, old: bytes, new: bytes, count: int = 1):
    data = path.read_bytes()
    assert old in data
    path.write_bytes(data.replace(old, new, count))
    return path


def test_a_damaged_compressed_member_is_refused(tmp_path):
    path = tmp_path / "crc.npz"
    np.savez_compressed(path, x=np.arange(4000, dtype=np.float32), labels=np.zeros(4000, np.int64))
    data = bytearray(path.read_bytes())
    data[len(data) // 4] ^= 0xFF  # inside x's deflated data: a bad CRC or a bad deflate stream
    path.write_bytes(bytes(data))
    with pytest.raises(OnnxcalError, match=r"array 'x' in .* cannot be read \((BadZipFile|error|Bad CRC-32)"):
        load_npz(path)  # was: BadZipFile or zlib.error from numpy


def test_an_unsupported_compression_method_is_refused(tmp_path):
    path = _demo_npz(tmp_path / "method.npz")
    # the compression method of the first member's local header and central entry: 0 (stored) -> 99
    data = bytearray(path.read_bytes())
    for sig, at in ((b"PK\x03\x04", 8), (b"PK\x01\x02", 10)):
        i = data.index(sig)
        data[i + at : i + at + 2] = (99).to_bytes(2, "little")
    path.write_bytes(bytes(data))
    with pytest.raises(OnnxcalError, match="cannot be read|not a readable .npz file"):
        load_npz(path)  # was: NotImplementedError from zipfile


def test_an_npy_header_that_breaks_numpys_parser_is_refused(tmp_path):
    path = _demo_npz(tmp_path / "header.npz")
    _damage(path, b"'descr': '<f4'", b"'descr': '<f4(")  # an unclosed bracket in the header's dict
    with pytest.raises(OnnxcalError, match=r"array 'x' .* cannot be read"):
        load_npz(path)  # was: tokenize.TokenError


def test_strings_that_are_not_unicode_are_refused(tmp_path):
    path = tmp_path / "labels.npz"
    np.savez(path, x=np.zeros((2, 3), np.float32), labels=np.array(["ab", "cd"]))
    _damage(path, "a".encode("utf-32-le"), (0x110000).to_bytes(4, "little"))  # past U+10FFFF
    with pytest.raises(OnnxcalError, match="holds text that is not valid Unicode"):
        load_npz(path)  # was: SystemError when numpy made a str of it
    big = tmp_path / "big_endian.npz"  # valid text in the other byte order is fine
    np.savez(big, x=np.zeros((2, 3), np.float32), labels=np.array(["ab", "cd"]).astype(">U2"))
    assert load_npz(big, require_labels=False).labels.tolist() == ["ab", "cd"]
