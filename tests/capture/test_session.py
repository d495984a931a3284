"""onnxcal.capture.session: the run options and their checks."""

import numpy as np
import pytest
from conftest import capture_of, random_mlp

from onnxcal.capture import RunOptions, check_run_options
from onnxcal.data import Dataset
from onnxcal.errors import OnnxcalError


def test_threads_and_optimisation_levels_give_the_same_logits(rng):
    model = random_mlp(rng)
    ds = Dataset({"x": rng.normal(size=(40, 6)).astype(np.float32)}, rng.integers(0, 4, 40), "mem")
    base = capture_of(model, ds).logits
    for options in (RunOptions(threads=1), RunOptions(optimization="disable"), RunOptions(batch_size=7)):
        np.testing.assert_allclose(capture_of(model, ds, options=options).logits, base, rtol=1e-6)


@pytest.mark.parametrize(
    "options, message",
    [
        (RunOptions(provider="NoSuchExecutionProvider"),
         "--provider NoSuchExecutionProvider is not available.*CPUExecutionProvider"),
        (RunOptions(optimization="max"), "--optimization 'max' .*disable, basic, extended, all"),
        (RunOptions(threads=-1),
         r"--threads -1 is out of range: give a number of threads "
         r"\(0: onnxruntime.s default, one per core\) from 0 to \d+"),
        (RunOptions(batch_size=0), "--batch-size 0 is out of range: give a number of samples from 1 to 16777216"),
    ],
)
def test_run_option_errors(options, message):
    with pytest.raises(OnnxcalError, match=message):
        check_run_options(options)
