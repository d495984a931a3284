"""CSV tables (``.csv``, or ``.tsv`` with tabs) with a header row, for models
with one (samples x features) input; the table reader serves the image
folders' labels CSV too.
"""

from __future__ import annotations

import csv
import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from .._paths import require_file
from ..errors import OnnxcalError
from ..graph import TensorSpec
from .fingerprint import combine, file_fingerprint
from .labels import class_indices
from .spec import Dataset


def read_table(path: Path) -> tuple[list[str], list[list[str]], list[int]]:
    """Header, rows of cells and each row's line number; blank lines skipped."""
    delimiter = "\t" if path.suffix.lower() == ".tsv" else ","
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.reader(fh, delimiter=delimiter)
            header = next(reader, None)
            rows, lines = [], []
            for row in reader:
                if row and any(cell.strip() for cell in row):
                    rows.append(row)
                    lines.append(reader.line_num)
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise OnnxcalError(f"'{path}' is not a readable CSV file ({exc})", "save it as UTF-8 CSV") from exc
    if not header or not any(h.strip() for h in header):
        raise OnnxcalError(f"'{path}' has no header row", "put the column names on the first line")
    header = [h.strip() for h in header]
    dup = next((h for i, h in enumerate(header) if h in header[:i]), None)
    if dup is not None:
        raise OnnxcalError(f"column '{dup}' appears twice in the header of '{path}'", "give each column a unique name")
    widths = np.fromiter((len(r) for r in rows), dtype=np.int64, count=len(rows))
    bad = np.flatnonzero(widths != len(header))
    if bad.size:
        i = int(bad[0])
        raise OnnxcalError(
            f"line {lines[i]} of '{path}' has {widths[i]} cells but the header has {len(header)} columns",
            "give every row one cell per column",
        )
    if not rows:
        raise OnnxcalError(f"'{path}' has a header but no rows", "give a non-empty validation set")
    return header, rows, lines


def column(rows: list[list[str]], j: int) -> np.ndarray:
    """Column ``j`` of the rows :func:`read_table` gives, as an array of strings."""
    return np.array([r[j] for r in rows])


def _numeric_column(cells: np.ndarray, path: Path, name: str, j: int, lines: list[int]) -> np.ndarray:
    try:
        return cells.astype(np.float64)
    except ValueError:
        for i, cell in enumerate(cells):  # find the first bad cell for the message
            try:
                float(cell)
            except ValueError:
                shown = "an empty cell" if not cell.strip() else f"'{cell}'"
                raise OnnxcalError(
                    f"line {lines[i]}, column '{name}' (column {j + 1}) of '{path}' holds {shown}, "
                    "not a number",
                    "fix the cell, or leave the column out with --feature-columns",
                ) from None
        raise


def _check_fits(values: np.ndarray, dtype: np.dtype, where: str, lines: list[int], input_name: str) -> None:
    """Refuse finite values the model input's dtype cannot hold (float16 above 65504, int8 above 127, ...).

    Cast, they would become Inf or wrap around without a word.
    """
    info = np.finfo(dtype) if dtype.kind == "f" else np.iinfo(dtype) if dtype.kind in "iu" else None
    if info is None or dtype == np.float64:
        return
    low, high = float(info.min), float(info.max)
    bad = np.isfinite(values) & ((values < low) | (values > high))
    if bad.any():
        i = int(np.argmax(bad))
        raise OnnxcalError(
            f"line {lines[i]}, {where} holds {values[i]:g}, outside what model input '{input_name}' "
            f"({dtype.name}) can hold ({low:g} to {high:g})",
            "rescale that column as the model was trained, or check the data",
        )


def load_csv(
    path: str | os.PathLike[str],
    model_input: TensorSpec,
    *,
    label_column: str | None = None,
    feature_columns: Sequence[str] | None = None,
    classes: Sequence[str] | None = None,
    require_labels: bool = True,
) -> Dataset:
    """A CSV table (header row) for a model with one (samples x features) input.

    Parameters
    ----------
    path : path
    model_input : TensorSpec
        The model's one input; features are cast to its dtype.
    label_column : str, default "label"
        Holds class indices, or class names when ``classes`` is given.
    feature_columns : sequence of str, optional
        Columns fed to the model, in order; by default every column but the
        label column, in file order.
    classes : sequence of str, optional
    require_labels : bool

    Raises
    ------
    OnnxcalError
        No header, ragged rows, a missing column, or a cell that is not a
        number (naming its line and column).
    """
    p = require_file(path, "data file")
    header, rows, lines = read_table(p)
    label_name = label_column or "label"
    has_labels = label_name in header
    if require_labels and not has_labels:
        raise OnnxcalError(
            f"'{p}' has no column '{label_name}' (columns: {', '.join(header)})",
            "name the label column with --label-column",
        )
    if feature_columns is None:
        features = [h for h in header if h != label_name]
    else:
        features = list(feature_columns)
        missing = [c for c in features if c not in header]
        if missing:
            raise OnnxcalError(
                f"--feature-columns names '{missing[0]}', which is not a column of '{p}' "
                f"(columns: {', '.join(header)})",
                "check the column names",
            )
    if not features:
        raise OnnxcalError(f"'{p}' has no feature columns", "give the features as columns beside the labels")
    shape = model_input.shape
    want = shape[1] if shape is not None and len(shape) == 2 and isinstance(shape[1], int) else None
    if shape is not None and len(shape) != 2:
        raise OnnxcalError(
            f"model input '{model_input.name}' has rank {len(shape)}, but a CSV table gives "
            "samples x features (rank 2)",
            "save the inputs as .npy or .npz instead",
        )
    if want is not None and want > 0 and want != len(features):
        raise OnnxcalError(
            f"'{p}' gives {len(features)} feature columns but model input '{model_input.name}' "
            f"takes {want} features",
            "choose the model's features, in order, with --feature-columns",
        )
    dtype = np.dtype(model_input.dtype) if model_input.dtype != "unknown" else np.dtype(np.float32)
    x = np.empty((len(rows), len(features)), dtype=dtype if dtype.kind == "f" else np.float64)
    for col, name in enumerate(features):
        j = header.index(name)
        values = _numeric_column(column(rows, j), p, name, j, lines)
        _check_fits(values, dtype, f"column '{name}' of '{p}'", lines, model_input.name)
        x[:, col] = values
    if dtype.kind in "iub":
        whole = np.isfinite(x) & (x == np.round(x))
        if not whole.all():
            i, col = (int(v[0]) for v in np.nonzero(~whole))
            raise OnnxcalError(
                f"line {lines[i]}, column '{features[col]}' of '{p}' holds {x[i, col]!r}, but model "
                f"input '{model_input.name}' takes {dtype} values",
                "give whole numbers",
            )
        x = x.astype(dtype)
    labels = None
    if has_labels:
        labels = csv_labels(column(rows, header.index(label_name)), p, label_name, lines, classes)
    return Dataset(
        inputs={model_input.name: x},
        labels=labels,
        source=str(p),
        data_id=combine([("csv", file_fingerprint(p))]),
    )


def csv_labels(
    cells: np.ndarray, path: Path, name: str, lines: list[int], classes: Sequence[str] | None
) -> np.ndarray:
    """A label column: class indices as numbers, or class names mapped through ``classes``."""
    try:
        return cells.astype(np.float64)
    except ValueError:
        pass
    if classes is None:
        first = next(c for c in cells if not _is_number(c))
        raise OnnxcalError(
            f"column '{name}' of '{path}' holds class names (e.g. '{first.strip()}'), not class indices",
            "pass --classes FILE with the class names, one per line, in the model's class order",
        )
    return class_indices(cells, classes, lambda i: f"line {lines[i]} of '{path}'")


def _is_number(cell: str) -> bool:
    try:
        float(cell)
    except ValueError:
        return False
    return True
