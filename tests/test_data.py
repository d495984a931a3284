"""Loading validation sets in every form and checking them against model inputs."""

import json

import numpy as np
import pytest
from PIL import Image

from conftest import (
    BELT_CLASSES,
    BELT_IMAGES,
    BELT_LABELS,
    BELT_PREPROCESS,
    DEMO_CLASSES,
    DEMO_CSV,
    DEMO_VAL,
    TICKETS,
    TICKETS_LABELS,
)
from onnxcal.data import (
    Dataset,
    DataSpec,
    ImageOptions,
    Selection,
    check_label_array,
    check_labels,
    image_options,
    load_dataset,
    load_npz,
    match_inputs,
    parse_shard,
    read_classes,
    selected_rows,
)
from onnxcal.errors import OnnxcalError
from onnxcal.graph import TensorSpec

SPEC = [TensorSpec("x", "float32", ("N", 3), True)]
DEMO_SPEC = [TensorSpec("band_energies", "float32", ("batch", 16), True)]
IMAGE_SPEC = [TensorSpec("image", "float32", ("batch", 3, 32, 32), True)]
TICKET_SPECS = [
    TensorSpec("input_ids", "int64", ("batch", 12)),
    TensorSpec("attention_mask", "int64", ("batch", 12)),
]
BELT_ORDER = ["clean", "rust_dust", "coolant_spill"]  # fixtures/belt_camera_classes.txt


def write(tmp_path, **arrays):
    path = tmp_path / "set.npz"
    np.savez(path, **arrays)
    return path


def load(specs=SPEC, require_labels=True, **kw):
    return load_dataset(DataSpec(**kw), specs, require_labels=require_labels)


def all_rows(ds):
    return ds.batch(0, ds.n, {k: None for k in ds.inputs})


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


@pytest.mark.parametrize(
    "arrays, message",
    [
        ({"y": np.zeros((2, 3))}, "no array for model input 'x'.*--input x=FILE.npy"),
        ({"x": np.zeros((2, 3)), "extra": np.zeros((2, 1))}, "'extra' that is not a model input"),
        ({"x": np.zeros((2, 3), dtype=np.complex64)}, "complex64 in the data but float32"),
        ({"x": np.zeros((2, 3, 1))}, "rank 3"),
        ({"x": np.zeros((2, 4))}, "size 4 on axis 1 in the data but 3"),
    ],
)
def test_match_inputs_errors(tmp_path, arrays, message):
    ds = load_npz(write(tmp_path, labels=np.array([0, 1]), **arrays))
    with pytest.raises(OnnxcalError, match=message):
        match_inputs(ds, SPEC)


def test_integer_data_may_feed_a_float_input(tmp_path):
    ds = load_npz(write(tmp_path, x=np.ones((2, 3), dtype=np.int16), labels=np.array([0, 1])))
    match_inputs(ds, SPEC)
    with pytest.raises(OnnxcalError, match="float64 in the data but int64"):
        match_inputs(
            load_npz(write(tmp_path, x=np.ones((2, 3)), labels=np.array([0, 1]))),
            [TensorSpec("x", "int64", ("N", 3))],
        )


def test_npz_string_labels_are_mapped_through_the_class_list(tmp_path):
    classes = tmp_path / "classes.txt"
    classes.write_text("cold\nwarm\nhot\n")
    path = write(tmp_path, x=np.zeros((4, 3)), labels=np.array(["hot", "cold", " warm", "hot"]))
    assert load(path=path, classes=classes).labels.tolist() == [2, 0, 1, 2]
    assert load(path=path, classes=classes).class_names == ("cold", "warm", "hot")
    with pytest.raises(OnnxcalError, match="labels in .* are names .*pass --classes"):
        load(path=path)
    bad = write(tmp_path, x=np.zeros((2, 3)), labels=np.array(["hot", "tepid"]))
    with pytest.raises(OnnxcalError, match="label 'tepid' at row 1 .* not in the class list"):
        load(path=bad, classes=classes)


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


def test_single_npy_as_data_for_a_one_input_model(tmp_path):
    x = np.arange(6, dtype=np.float32).reshape(2, 3)
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "y.npy", np.array([1, 0]))
    ds = load(path=tmp_path / "x.npy", labels=tmp_path / "y.npy")
    np.testing.assert_array_equal(ds.inputs["x"], x)
    with pytest.raises(OnnxcalError, match="can feed a model with one input.*--input NAME=FILE.npy"):
        load(TICKET_SPECS, path=tmp_path / "x.npy", labels=tmp_path / "y.npy")


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
# CSV


def test_csv_matches_the_npz_it_was_made_from():
    ds = load(DEMO_SPEC, path=DEMO_CSV, label_column="condition", classes=DEMO_CLASSES)
    val = np.load(DEMO_VAL)
    np.testing.assert_array_equal(ds.inputs["band_energies"], val["band_energies"][:400])
    np.testing.assert_array_equal(ds.labels, val["labels"][:400])
    # numpy's own parser (numpy.loadtxt) reads the same numbers
    ref = np.loadtxt(DEMO_CSV, delimiter=",", skiprows=1, usecols=range(16), dtype=np.float32)
    np.testing.assert_array_equal(ds.inputs["band_energies"], ref)
    assert ds.class_names[0] == "healthy"


def csv_file(tmp_path, text, name="t.csv"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_csv_feature_columns_choose_and_order(tmp_path):
    path = csv_file(tmp_path, "b,label,a,c,note\n1,0,2,3,9\n4,1,5,6,9\n")
    ds = load(path=path, feature_columns=["a", "b", "c"])
    np.testing.assert_array_equal(ds.inputs["x"], [[2, 1, 3], [5, 4, 6]])
    assert ds.labels.tolist() == [0, 1]
    with pytest.raises(OnnxcalError, match="gives 4 feature columns but model input 'x' takes 3.*--feature-columns"):
        load(path=path)
    with pytest.raises(OnnxcalError, match="--feature-columns names 'd', which is not a column"):
        load(path=path, feature_columns=["a", "b", "d"])


def test_tsv_and_integer_model_inputs(tmp_path):
    path = csv_file(tmp_path, "a\tb\tc\tlabel\n1\t2\t3\t0\n", "t.tsv")
    ds = load([TensorSpec("x", "int64", ("N", 3))], path=path)
    assert ds.inputs["x"].dtype == np.int64 and ds.inputs["x"].tolist() == [[1, 2, 3]]
    frac = csv_file(tmp_path, "a,b,c,label\n1,2.5,3,0\n")
    with pytest.raises(OnnxcalError, match="line 2, column 'b' .* takes int64 values"):
        load([TensorSpec("x", "int64", ("N", 3))], path=frac)


@pytest.mark.parametrize(
    "text, message",
    [
        ("a,b,c,label\n1,2,3,0\n4,x5,6,1\n", "line 3, column 'b' .column 2. of .* holds 'x5', not a number"),
        ("a,b,c,label\n1,2,3,0\n4,,6,1\n", "line 3, column 'b' .* holds an empty cell"),
        ("a,b,c,label\n1,2,3,0\n\n4,5,1\n", "line 4 of .* has 3 cells but the header has 4 columns"),
        ("a,b,c,y\n1,2,3,0\n", "no column 'label' .columns: a, b, c, y.*--label-column"),
        ("a,b,a,label\n1,2,3,0\n", "column 'a' appears twice"),
        ("", "no header row"),
        ("a,b,c,label\n", "header but no rows"),
        ("a,b,c,label\n1,2,3,cat\n", "holds class names .e.g. 'cat'.*pass --classes"),
        ("a,b,c,label\n1,2,3,2.5\n", "label 2.5 at row 0 .* not a whole class index"),
    ],
)
def test_csv_errors_name_the_line_and_column(tmp_path, text, message):
    with pytest.raises(OnnxcalError, match=message):
        ds = load(path=csv_file(tmp_path, text))
        check_labels(ds.labels, ds.n, 3, ds.source)


def test_csv_string_labels_and_unknown_names(tmp_path):
    classes = csv_file(tmp_path, "cat\ndog\n", "classes.txt")
    path = csv_file(tmp_path, "a,b,c,label\n1,2,3,dog\n1,2,3,cat\n1,2,3,emu\n")
    with pytest.raises(OnnxcalError, match="label 'emu' at line 4 of .* not in the class list"):
        load(path=path, classes=classes)
    ds = load(path=csv_file(tmp_path, "a,b,c,label\n1,2,3,dog\n1,2,3,cat\n"), classes=classes)
    assert ds.labels.tolist() == [1, 0]


def test_csv_without_labels_for_verify(tmp_path):
    ds = load(path=csv_file(tmp_path, "a,b,c\n1,2,3\n"), require_labels=False)
    assert ds.labels is None and ds.inputs["x"].shape == (1, 3)


# --------------------------------------------------------------------------
# Class lists


@pytest.mark.parametrize(
    "text, message",
    [("a\n\nb\n", "line 2 .* is blank"), ("a\nb\na\n", "class 'a' is listed twice in .* .lines 1 and 3"), ("\n\n", "no class names")],
)
def test_class_file_errors(tmp_path, text, message):
    path = tmp_path / "c.txt"
    path.write_text(text)
    with pytest.raises(OnnxcalError, match=message):
        read_classes(path)


def test_class_file_trailing_blank_lines_and_spaces(tmp_path):
    path = tmp_path / "c.txt"
    path.write_text(" a \nb\n\n")
    assert read_classes(path) == ("a", "b")


# --------------------------------------------------------------------------
# Image folders


def reference_pixels(path, side=32, mean=(0.485, 0.456, 0.406), std=(0.229, 0.224, 0.225)):
    """Resize the shorter side with Pillow, centre-crop, then normalise in numpy
    as (x / 255 - mean) / std, channels first (common practice for RGB models)."""
    img = Image.open(path).convert("RGB")
    w, h = img.size
    s = side / min(w, h)
    img = img.resize((round(w * s), round(h * s)), Image.Resampling.BILINEAR)
    w, h = img.size
    left, top = (w - side) // 2, (h - side) // 2
    arr = np.asarray(img.crop((left, top, left + side, top + side)), dtype=np.float64)
    return ((arr / 255.0 - np.array(mean)) / np.array(std)).transpose(2, 0, 1)


def test_image_folder_with_class_list_and_preprocessing_file():
    ds = load(IMAGE_SPEC, path=BELT_IMAGES, classes=BELT_CLASSES, preprocess=BELT_PREPROCESS)
    assert ds.n == 30 and ds.inputs["image"].shape == (30, 3, 32, 32)
    assert ds.class_names == tuple(BELT_ORDER)
    files = ds.inputs["image"].files
    # sorted folders: clean, coolant_spill, rust_dust; labels follow the class list instead
    expect = [BELT_ORDER.index(f.split("/")[0]) for f in files]
    assert ds.labels.tolist() == expect
    batch = ds.batch(0, 30, {"image": "float32"})["image"]
    assert batch.dtype == np.float32 and batch.flags.c_contiguous
    for i in (0, 13, 29):
        np.testing.assert_allclose(batch[i], reference_pixels(BELT_IMAGES / files[i]), atol=1e-5)
    assert ds.preprocess["layout"] == "NCHW" and ds.preprocess["crop"] == [32, 32]


def test_image_folder_without_class_list_uses_sorted_folder_names():
    ds = load(IMAGE_SPEC, path=BELT_IMAGES, preprocess=BELT_PREPROCESS)
    assert ds.class_names == ("clean", "coolant_spill", "rust_dust")
    assert ds.labels.tolist() == [0] * 10 + [1] * 10 + [2] * 10


def test_image_labels_csv_gives_the_same_labels_as_the_folders():
    folders = load(IMAGE_SPEC, path=BELT_IMAGES, classes=BELT_CLASSES, preprocess=BELT_PREPROCESS)
    listed = load(IMAGE_SPEC, path=BELT_IMAGES, labels=BELT_LABELS, classes=BELT_CLASSES, preprocess=BELT_PREPROCESS)
    by_file = dict(zip(folders.inputs["image"].files, folders.labels.tolist()))
    assert [by_file[f] for f in listed.inputs["image"].files] == listed.labels.tolist()
    assert listed.inputs["image"].files != folders.inputs["image"].files  # CSV order kept


def test_bgr_reverses_the_channels():
    rgb = load(IMAGE_SPEC, path=BELT_IMAGES, preprocess=BELT_PREPROCESS, image={"mean": "0,0,0", "std": "1,1,1"})
    bgr = load(IMAGE_SPEC, path=BELT_IMAGES, preprocess=BELT_PREPROCESS,
               image={"channel_order": "BGR", "mean": "0,0,0", "std": "1,1,1"})
    a = rgb.batch(0, 4, {"image": "float32"})["image"]
    b = bgr.batch(0, 4, {"image": "float32"})["image"]
    np.testing.assert_array_equal(b, a[:, ::-1])


def test_nhwc_layout_is_read_from_the_model():
    spec = [TensorSpec("image", "float32", ("batch", 32, 32, 3), True)]
    ds = load(spec, path=BELT_IMAGES, image={"resize": 32, "crop": "32"})
    assert ds.inputs["image"].shape == (30, 32, 32, 3) and ds.preprocess["layout"] == "NHWC"
    nchw = load(IMAGE_SPEC, path=BELT_IMAGES, image={"resize": 32, "crop": "32"})
    np.testing.assert_array_equal(
        ds.batch(0, 2, {"image": "float32"})["image"],
        nchw.batch(0, 2, {"image": "float32"})["image"].transpose(0, 2, 3, 1),
    )
    assert 0.0 <= float(ds.batch(0, 2, {"image": "float32"})["image"].max()) <= 1.0  # scaled by default


def test_uint8_and_grayscale_models(tmp_path):
    spec = [TensorSpec("image", "uint8", ("batch", 1, 24, 24))]
    ds = load(spec, path=BELT_IMAGES, image={"resize": 24, "crop": 24})
    batch = ds.batch(0, 3, {"image": "uint8"})["image"]
    assert batch.dtype == np.uint8 and batch.shape == (3, 1, 24, 24)
    with pytest.raises(OnnxcalError, match="takes uint8 pixels.*drop --scale, --mean and --std"):
        load(spec, path=BELT_IMAGES, image={"resize": 24, "crop": 24, "mean": 0.5})


@pytest.mark.parametrize(
    "image, message",
    [
        ({}, r"comes out \d+x\d+ .* takes 32x32; set --crop 32"),
        ({"resize": 32, "crop": 40}, r"--crop 40x40 is larger than image"),
        ({"resize": 32, "crop": 32, "mean": "0.5,0.5"}, "--mean has 2 values but the model takes 3-channel"),
        ({"resize": 32, "crop": 32, "dtype": "float16"}, "--dtype float16 does not match .* takes float32"),
        ({"resize": "big"}, "--resize = .big. is not a number of pixels from 1 to 65535"),
        ({"crop": "2x3x4"}, "--crop = '2x3x4' is not a size"),
        ({"std": "1,0,1"}, "--std = '1,0,1' is not a list of finite numbers .std > 0"),
        ({"layout": "CHW"}, "--layout = 'CHW' is not NCHW or NHWC"),
        ({"colour": "warm"}, "--colour is not a preprocessing option"),
    ],
)
def test_image_option_errors_name_the_option(image, message):
    with pytest.raises(OnnxcalError, match=message):
        ds = load(IMAGE_SPEC, path=BELT_IMAGES, image=image)
        ds.batch(0, ds.n, {"image": "float32"})  # sizes are checked image by image


def test_unequal_images_without_crop_fail_naming_the_file():
    spec = [TensorSpec("image", "float32", ("batch", 3, "h", "w"), True)]
    ds = load(spec, path=BELT_IMAGES)
    with pytest.raises(OnnxcalError, match="comes out .* but '.*' came out .*set --crop"):
        ds.batch(0, 30, {"image": "float32"})


def test_preprocessing_file_json_and_overrides(tmp_path):
    path = tmp_path / "p.json"
    path.write_text(json.dumps({"resize": 40, "crop": [32, 32], "scale": False}))
    opts = image_options({"resize": "36"}, path)
    assert opts == ImageOptions(resize=36, crop=(32, 32), scale=False)
    path.write_text(json.dumps({"resise": 40}))
    with pytest.raises(OnnxcalError, match="'resise' in .*p.json' is not a preprocessing option"):
        image_options({}, path)
    bad = tmp_path / "p.toml"
    bad.write_text("resize = [")
    with pytest.raises(OnnxcalError, match="cannot be parsed"):
        image_options({}, bad)


def image_tree(tmp_path, layout):
    root = tmp_path / "imgs"
    for rel in layout:
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        if rel.endswith(".png"):
            Image.new("RGB", (32, 32), (10, 20, 30)).save(root / rel)
        else:
            (root / rel).write_text("not an image")
    return root


@pytest.mark.parametrize(
    "layout, extra, message",
    [
        (["a/1.png", "stray.png"], {}, "image 'stray.png' lies directly in"),
        (["a/1.png", "b/notes.txt"], {}, "class subfolder .*b' holds no images"),
        (["a/1.png", "c/1.png"], {"classes": True}, "label 'c' at subfolder 'c' .* not in the class list"),
        (["notes.txt"], {}, "has no class subfolders"),
    ],
)
def test_image_folder_errors(tmp_path, layout, extra, message):
    root = image_tree(tmp_path, layout)
    kw = {}
    if extra.get("classes"):
        (tmp_path / "classes.txt").write_text("a\nb\n")
        kw["classes"] = tmp_path / "classes.txt"
    with pytest.raises(OnnxcalError, match=message):
        load(IMAGE_SPEC, path=root, **kw)


def test_broken_image_names_the_file(tmp_path):
    root = image_tree(tmp_path, ["a/1.png", "a/2.png"])
    (root / "a/2.png").write_bytes(b"\x89PNG broken")
    ds = load(IMAGE_SPEC, path=root)
    with pytest.raises(OnnxcalError, match="image .*a/2.png' cannot be read"):
        ds.batch(0, 2, {"image": "float32"})


def test_labels_csv_errors(tmp_path):
    root = image_tree(tmp_path, ["a/1.png"])
    table = tmp_path / "labels.csv"
    table.write_text("path,label\na/1.png,0\n")
    with pytest.raises(OnnxcalError, match="no column 'file'"):
        load(IMAGE_SPEC, path=root, labels=table)
    table.write_text("file,label\na/9.png,0\n")
    with pytest.raises(OnnxcalError, match="line 2 of .* names 'a/9.png', which is not a file"):
        load(IMAGE_SPEC, path=root, labels=table)


# --------------------------------------------------------------------------
# Options that do not apply, selection


@pytest.mark.parametrize(
    "kw, message",
    [
        ({"path": DEMO_VAL, "image": {"resize": 3}}, "--resize applies to image folders only"),
        ({"path": DEMO_VAL, "feature_columns": ["a"]}, "--feature-columns applies to CSV data only"),
        ({"path": DEMO_CSV, "labels": TICKETS_LABELS}, "--labels does not apply to CSV"),
        ({"path": DEMO_VAL, "label_column": "y"}, "--label-column applies to CSV"),
        ({"path": DEMO_VAL, "inputs": TICKETS}, "either --data or --input"),
        ({}, "no validation data given"),
        ({"path": DEMO_VAL, "labels": TICKETS_LABELS}, "holds a 'labels' array and --labels was given"),
    ],
)
def test_options_that_do_not_apply(kw, message):
    with pytest.raises(OnnxcalError, match=message):
        load(DEMO_SPEC, **kw)


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
    [("2", "not of the form I/N"), ("0/4", "shards are numbered 1 to N"), ("5/4", "out of range"), ("a/b", "not of the form")],
)
def test_parse_shard_errors(text, message):
    with pytest.raises(OnnxcalError, match=message):
        parse_shard(text)


def test_selection_errors(tmp_path):
    with pytest.raises(OnnxcalError, match="shard 1/3 of .* holds no rows .the set has 2"):
        load(path=write(tmp_path, x=np.zeros((2, 3)), labels=np.array([0, 1])), selection=Selection(shard=(1, 3)))
    with pytest.raises(OnnxcalError, match="--limit 0 is out of range: give a number of samples of at least 1"):
        load(path=DEMO_VAL, selection=Selection(limit=0))


def test_fingerprint_follows_content_not_path(tmp_path):
    x = np.arange(9, dtype=np.float32).reshape(3, 3)
    a = load(path=write(tmp_path, x=x, labels=np.array([0, 1, 2])))
    (tmp_path / "other").mkdir()
    b = load(path=write(tmp_path / "other", x=x, labels=np.array([0, 1, 2])))
    c = load(path=write(tmp_path / "other", x=x + 1, labels=np.array([0, 1, 2])))
    assert a.data_id == b.data_id != c.data_id


# --------------------------------------------------------------------------
# Labels


@pytest.mark.parametrize(
    "labels, message",
    [
        (np.array([0.0, 1.5, 2.0]), "label 1.5 at row 1 .* not a whole class index"),
        (np.array([0, -1, 2]), r"label -1 at row 1 .* outside \[0, 3\)"),
        (np.array([0, 1, 3]), r"label 3 at row 2 .* outside \[0, 3\)"),
        (np.array([0, 1]), "2 labels for 3 samples"),
        (np.array(["a", "b", "c"]), "not integers"),
        (np.zeros((3, 2), np.int64), "one label per sample"),
    ],
)
def test_check_labels_errors(labels, message):
    with pytest.raises(OnnxcalError, match=message):
        check_labels(labels, 3, 3, "set.npz")


def test_whole_float_labels_are_accepted():
    out = check_labels(np.array([0.0, 2.0, 1.0]), 3, 3, "set.npz")
    assert out.dtype == np.int64 and out.tolist() == [0, 2, 1]


def test_in_memory_dataset_still_works():
    ds = Dataset({"x": np.zeros((4, 3), np.float32)}, np.array([0, 1, 2, 0]), "mem")
    assert ds.n == ds.total == 4 and ds.row_numbers().tolist() == [0, 1, 2, 3]


def test_multilabel_and_single_logit_labels():
    y = np.array([[0, 1, 1], [1, 0, 0]])
    out = check_label_array(y, 2, 3, "set.npz")
    assert out.dtype == np.uint8 and out.tolist() == y.tolist()
    # A single-logit binary model takes 0/1 class labels.
    assert check_label_array(np.array([0, 1, 1]), 3, 1, "set.npz").tolist() == [0, 1, 1]
    with pytest.raises(OnnxcalError, match=r"label 2 at row 0, column 1 .* is not 0 or 1"):
        check_label_array(np.array([[0, 2, 1], [1, 0, 0]]), 2, 3, "set.npz")
    with pytest.raises(OnnxcalError, match=r"shape \(2, 2\), expected \(2, 3\)"):
        check_label_array(np.array([[0, 1], [1, 0]]), 2, 3, "set.npz")
    with pytest.raises(OnnxcalError, match=r"label 2 at row 0 .* outside \[0, 2\)"):
        check_label_array(np.array([2, 0]), 2, 1, "set.npz")


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


# --------------------------------------------------------------------------
# Issue 11: file names of any bytes, paths inside the folder, pixel depths


def _png_bytes(width: int, height: int, depth: int, colour: int, rows: np.ndarray) -> bytes:
    """A PNG written by hand (PNG spec, ISO/IEC 15948: IHDR, one IDAT of filter-0 rows, IEND)."""
    import struct
    import zlib

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))

    raw = b"".join(b"\x00" + row.tobytes() for row in rows)
    ihdr = struct.pack(">IIBBBBB", width, height, depth, colour, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(raw)) + chunk(b"IEND", b"")


def test_sixteen_bit_greyscale_is_reduced_by_the_bit_depth_not_saturated(tmp_path):
    """A 16-bit PNG's values 1000 and 20000 both reached the model as 255; now they keep their scale.

    The reference is Pillow's own reading of a 16-bit colour PNG holding the
    same samples in each channel: it keeps the high byte of each (3 and 78).
    """
    samples = np.array([[1000, 20000] * 16] * 32, ">u2")
    root = tmp_path / "imgs"
    (root / "a").mkdir(parents=True)
    (root / "a" / "grey16.png").write_bytes(_png_bytes(32, 32, 16, 0, samples))
    colour = tmp_path / "rgb48.png"
    colour.write_bytes(_png_bytes(32, 32, 16, 2, np.repeat(samples, 3, axis=1)))
    with Image.open(root / "a" / "grey16.png") as img:
        assert img.mode == "I;16"  # what made convert("RGB") saturate
    pillow = np.asarray(Image.open(colour).convert("RGB"))[..., 0]
    assert sorted(set(pillow.ravel().tolist())) == [3, 78]
    ds = load(IMAGE_SPEC, path=root, image={"scale": False})
    x = ds.batch(0, 1, {"image": "float32"})["image"][0]
    assert np.array_equal(x[0], pillow.astype(np.float32)) and np.array_equal(x[0], x[2])


def test_image_files_and_folders_named_with_any_bytes_load(tmp_path):
    """Names that are not UTF-8 gave an internal UnicodeEncodeError; the class name shows the byte escaped."""
    import os

    root = image_tree(tmp_path, ["a/1.png", "b/1.png"])
    Image.new("RGB", (32, 32), (50, 60, 70)).save(root / "a" / os.fsdecode(b"caf\xe9.png"))
    os.rename(root / "b", root / os.fsdecode(b"r\xfcst"))
    ds = load(IMAGE_SPEC, path=root)
    assert ds.n == 3 and ds.class_names == ("a", "r\\xfcst")
    assert ds.batch(0, 3, {"image": "float32"})["image"].shape == (3, 3, 32, 32)


@pytest.mark.parametrize("name", ["../outside.png", "a/../../outside.png", "/etc/passwd"])
def test_a_labels_csv_cannot_reach_outside_the_image_folder(tmp_path, name):
    root = image_tree(tmp_path, ["a/1.png"])
    Image.new("RGB", (32, 32)).save(tmp_path / "outside.png")
    table = tmp_path / "labels.csv"
    table.write_text(f"file,label\na/1.png,0\n{name},1\n")
    message = f"line 3 of '.*labels.csv' names '{name}', which is outside the image folder"
    with pytest.raises(OnnxcalError, match=message):
        load(IMAGE_SPEC, path=root, labels=table)


def test_csv_values_beyond_the_input_dtype_are_refused(tmp_path):
    table = tmp_path / "t.csv"
    table.write_text("f0,f1,f2,label\n1,2,3,0\n4,-70000,6,1\n")
    spec = [TensorSpec("x", "float16", ("N", 3), True)]
    message = r"line 3, column 'f1' .* holds -70000, outside .* \(float16\) can hold \(-65504 to 65504\)"
    with pytest.raises(OnnxcalError, match=message):
        load(spec, path=table)
    spec = [TensorSpec("x", "int8", ("N", 3), True)]
    table.write_text("f0,f1,f2,label\n1,2,300,0\n")
    with pytest.raises(OnnxcalError, match=r"holds 300, outside .* \(int8\) can hold \(-128 to 127\)"):
        load(spec, path=table)
