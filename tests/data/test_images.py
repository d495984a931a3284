"""Image folders: class subfolders, a labels CSV, decoding with Pillow (onnxcal/data/images.py)."""

import numpy as np
import pytest
from conftest import BELT_CLASSES, BELT_IMAGES, BELT_LABELS, BELT_PREPROCESS
from data_helpers import IMAGE_SPEC, load
from PIL import Image

from onnxcal.errors import OnnxcalError
from onnxcal.graph import TensorSpec

BELT_ORDER = ["clean", "rust_dust", "coolant_spill"]  # fixtures/belt_camera_classes.txt


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
    by_file = dict(zip(folders.inputs["image"].files, folders.labels.tolist(), strict=True))
    assert [by_file[f] for f in listed.inputs["image"].files] == listed.labels.tolist()
    assert listed.inputs["image"].files != folders.inputs["image"].files  # CSV order kept


def test_unequal_images_without_crop_fail_naming_the_file():
    spec = [TensorSpec("image", "float32", ("batch", 3, "h", "w"), True)]
    ds = load(spec, path=BELT_IMAGES)
    with pytest.raises(OnnxcalError, match="comes out .* but '.*' came out .*set --crop"):
        ds.batch(0, 30, {"image": "float32"})


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


def _pillow_array(path, mode, resize=None, crop=None):
    """The pixels the plain way: Pillow's convert, resize and crop, then numpy.asarray (uint8 H x W x C)."""
    img = Image.open(path).convert(mode)
    if resize is not None:
        w, h = img.size
        s = resize / min(w, h)
        img = img.resize((max(1, round(w * s)), max(1, round(h * s))), Image.Resampling.BILINEAR)
    if crop is not None:
        w, h = img.size
        left, top = (w - crop) // 2, (h - crop) // 2
        img = img.crop((left, top, left + crop, top + crop))
    arr = np.asarray(img, dtype=np.uint8)
    return arr[:, :, None] if arr.ndim == 2 else arr


@pytest.mark.parametrize("case", ["rgb", "bgr-mean-std", "resize-crop", "grey", "palette", "nhwc-uint8"])
def test_decoded_pixels_are_pillows_to_the_bit(tmp_path, case):
    """Each image decoded into its place in the batch (no per-image convert to the mode it has, bytes read
    once) gives what Pillow's convert + numpy.asarray give, then x * float32(1/255), - mean, / std in
    float32: for JPEG (RGB), greyscale and palette PNGs, with resize, crop, BGR and NHWC uint8."""
    rng = np.random.default_rng(5)
    folder = tmp_path / "imgs" / "a"
    folder.mkdir(parents=True)
    side = 40 if case == "resize-crop" else 24
    for i in range(7):
        low = rng.integers(0, 256, (6, 6, 3)).astype(np.uint8)
        img = Image.fromarray(low).resize((side + i % 2 * 6, side), Image.BILINEAR)
        if case == "palette":
            img.convert("P", palette=Image.Palette.ADAPTIVE).save(folder / f"{i}.png")
        elif case == "grey":
            img.convert("L").save(folder / f"{i}.png")
        else:
            img.save(folder / f"{i}.jpg", quality=85)
    channels = 1 if case == "grey" else 3
    dtype = "uint8" if case == "nhwc-uint8" else "float32"
    shape = ("batch", 24, 24, channels) if case == "nhwc-uint8" else ("batch", channels, 24, 24)
    image = {"crop": [24, 24]} if case in ("rgb", "palette", "grey", "nhwc-uint8", "bgr-mean-std") else {
        "resize": 30, "crop": [24, 24]}
    if case == "bgr-mean-std":
        image.update(channel_order="BGR", mean=[0.4, 0.5, 0.6], std=[0.2, 0.25, 0.3])
    spec = [TensorSpec("image", dtype, shape, True)]
    got = load(spec, path=tmp_path / "imgs", image=image).inputs["image"][0:7]
    files = sorted(folder.iterdir())
    mode = "L" if channels == 1 else "RGB"
    raw = np.stack([_pillow_array(f, mode, image.get("resize"), 24) for f in files])
    if case == "nhwc-uint8":
        np.testing.assert_array_equal(got, raw)
        assert got.dtype == np.uint8
        return
    if case == "bgr-mean-std":
        raw = raw[..., ::-1]
    want = raw.transpose(0, 3, 1, 2) * np.float32(1.0 / 255.0)
    if case == "bgr-mean-std":
        want = (want - np.float32([0.4, 0.5, 0.6])[:, None, None]) / np.float32([0.2, 0.25, 0.3])[:, None, None]
    assert got.dtype == np.float32 and want.dtype == np.float32
    assert got.tobytes() == want.tobytes()
