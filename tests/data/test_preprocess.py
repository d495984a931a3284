"""Image preprocessing: the options, the file, the plan against the model input (onnxcal/data/preprocess.py)."""

import json

import numpy as np
import pytest
from conftest import BELT_IMAGES, BELT_PREPROCESS
from data_helpers import IMAGE_SPEC, load

from onnxcal.data import ImageOptions, image_options
from onnxcal.errors import OnnxcalError
from onnxcal.graph import TensorSpec


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
