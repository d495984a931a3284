"""Load the set a :class:`~onnxcal.data.DataSpec` describes: choose its form,
refuse options that form would ignore, read it, map string labels through the
class list, check it against the model's inputs and apply the selection.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace
from pathlib import Path

from ..errors import OnnxcalError
from ..graph import TensorSpec
from .arrays import load_arrays, load_npy, load_npz, with_npy_labels
from .csv import load_csv
from .feeding import check_feeding, with_constants
from .images import load_image_folder
from .inputs import match_inputs
from .labels import map_labels, read_classes
from .preprocess import image_options
from .spec import LABELS_KEY, Dataset, DataSpec, check_selection, select


def load_dataset(
    spec: DataSpec, model_inputs: Sequence[TensorSpec], *, require_labels: bool = True
) -> Dataset:
    """Load the set ``spec`` describes for a model with inputs ``model_inputs``.

    Reads the class names, maps string labels through them, checks the set
    against the model's inputs and applies the selection.

    Raises
    ------
    OnnxcalError
        Anything about the files, options or arrays that cannot feed the model.
    """
    check_selection(spec.selection)
    classes = read_classes(spec.classes) if spec.classes is not None else None
    if spec.arrays is not None:
        return _load_memory(spec, model_inputs, classes, require_labels)
    if spec.inputs and spec.path is not None:
        raise OnnxcalError("give either --data or --input NAME=FILE.npy, not both")
    if not spec.inputs and spec.path is None:
        raise OnnxcalError("no validation data given", "pass --data PATH or --input NAME=FILE.npy")
    path = Path(spec.path) if spec.path is not None else None
    form = "images" if path is not None and path.is_dir() else "csv" if _is_csv(path) else "arrays"
    _check_options_apply(spec, form)
    check_feeding(spec, model_inputs)
    fed = [s for s in model_inputs if s.name not in spec.constants]  # inputs the data feed
    if form == "images" and path is not None:
        ds = load_image_folder(
            path, _single_input(fed, path), image_options(spec.image, spec.preprocess),
            labels_csv=spec.labels, label_column=spec.label_column, classes=classes,
        )
    elif form == "csv" and path is not None:
        ds = load_csv(
            path, _single_input(fed, path), label_column=spec.label_column,
            feature_columns=spec.feature_columns, classes=classes, require_labels=require_labels,
        )
    elif path is None or spec.inputs or path.suffix.lower() == ".npy":
        files = dict(spec.inputs) if spec.inputs or path is None else {_single_input(fed, path).name: path}
        ds = load_npy(files, spec.labels, require_labels=require_labels, batch_axes=spec.batch_axes,
                      specs=model_inputs, constants=tuple(spec.constants))
    else:
        ds = load_npz(path, require_labels=require_labels and spec.labels is None, batch_axes=spec.batch_axes,
                      specs=model_inputs, constants=tuple(spec.constants))
        if spec.labels is not None:
            if ds.labels is not None:
                raise OnnxcalError(
                    f"'{path}' holds a '{LABELS_KEY}' array and --labels was given too",
                    "drop --labels or the array",
                )
            ds = with_npy_labels(ds, spec.labels)
    return _checked(ds, spec, model_inputs, classes)


def _checked(
    ds: Dataset, spec: DataSpec, model_inputs: Sequence[TensorSpec], classes: tuple[str, ...] | None
) -> Dataset:
    """String labels mapped through the classes, the inputs checked against the model's, the selection applied."""
    if ds.labels is not None:
        ds = replace(ds, labels=map_labels(ds.labels, classes, ds.source, classes_file=spec.classes))
    if classes is not None:
        ds = replace(ds, class_names=classes)
    ds = with_constants(ds, spec, model_inputs)
    if spec.batch_axes:
        ds = replace(ds, batch_axes={k: v for k, v in spec.batch_axes.items() if k in ds.inputs})
    match_inputs(ds, model_inputs)
    return select(ds, spec.selection)


def _load_memory(
    spec: DataSpec, model_inputs: Sequence[TensorSpec], classes: tuple[str, ...] | None, require_labels: bool
) -> Dataset:
    """A set given as arrays in memory (the Python API), with every check of an ``.npz``."""
    if spec.path is not None or spec.inputs:
        raise OnnxcalError("give the validation set either as arrays or as files, not both",
                           "drop path/inputs from the DataSpec, or its arrays")
    _check_options_apply(spec, "arrays")
    if spec.labels is not None:
        raise OnnxcalError("labels are given as a file and the validation set as arrays",
                           "add the labels to the arrays under 'labels'")
    assert spec.arrays is not None
    check_feeding(spec, model_inputs)
    ds = load_arrays(spec.arrays, model_inputs, require_labels=require_labels, batch_axes=spec.batch_axes,
                     constants=tuple(spec.constants))
    return _checked(ds, spec, model_inputs, classes)


def _is_csv(path: Path | None) -> bool:
    return path is not None and path.suffix.lower() in (".csv", ".tsv")


def _check_options_apply(spec: DataSpec, form: str) -> None:
    """Refuse options that the chosen form would silently ignore."""
    if form != "images" and (spec.image or spec.preprocess is not None):
        key = next(iter(spec.image), None)
        what = f"--{key.replace('_', '-')}" if key else "--preprocess"
        raise OnnxcalError(f"{what} applies to image folders only", "drop it for this data")
    if form != "csv" and spec.feature_columns is not None:
        raise OnnxcalError("--feature-columns applies to CSV data only", "drop it for this data")
    if form == "csv" and spec.labels is not None:
        raise OnnxcalError(
            "--labels does not apply to CSV data", "name the label column with --label-column"
        )
    if form != "arrays" and spec.batch_axes:
        raise OnnxcalError(
            "--batch-axis applies to array data (.npz or --input NAME=FILE.npy) only", "drop it for this data"
        )
    if form == "arrays" and spec.label_column is not None:
        raise OnnxcalError(
            "--label-column applies to CSV tables and image-labels CSV files only",
            "drop it for array data",
        )


def _single_input(model_inputs: Sequence[TensorSpec], path: Path) -> TensorSpec:
    if len(model_inputs) != 1:
        names = ", ".join(s.name for s in model_inputs)
        raise OnnxcalError(
            f"'{path}' can feed a model with one input, but this model has {len(model_inputs)} "
            f"({names})",
            "give one array per input with --input NAME=FILE.npy (or an .npz)",
        )
    return model_inputs[0]
