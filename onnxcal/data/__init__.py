"""Load labelled validation sets in the forms people keep them, and check them
against a model's inputs.

A validation set is a :class:`Dataset`: one array per model input (first
axis = samples), integer labels, and which of its rows are selected. The
forms (see :class:`DataSpec`), one module each:

* ``arrays``: an ``.npz`` with one array per model input plus ``labels``, or
  one ``.npy`` per model input (``--input NAME=FILE.npy``) plus ``--labels``;
* ``csv``: a CSV table with a header row, for models with one tabular input;
* ``images``: a folder of images, one subfolder per class (or a labels CSV),
  with the preprocessing (``preprocess``) given as options or in a small
  TOML/JSON file.

Beside them: ``spec`` (:class:`Selection`, :class:`Dataset`,
:class:`DataSpec`), ``labels`` (class names, label checks), ``inputs`` (the
set against the model's inputs), ``fingerprint`` (the ``data_id`` of the
files) and ``load`` (:func:`load_dataset`, which chooses the form).

Nothing is read whole that need not be: ``.npy`` files are opened with
``mmap_mode='r'``, uncompressed ``.npz`` members are memory-mapped in place,
and images are decoded batch by batch. :meth:`Dataset.release` gives the
pages of a batch that has been run back to the kernel, so reading a set
larger than memory keeps the resident size at about one batch. Every load
uses ``allow_pickle=False``.
"""

from .arrays import MEMORY_SOURCE, load_arrays, load_npy, load_npz, read_npy, read_npz
from .axes import ZEROS
from .csv import load_csv
from .feeding import check_feeding, constant_record, make_constant, recorded_feeding, with_constants
from .fingerprint import file_fingerprint
from .images import ENLARGE_WARNING, IMAGE_SUFFIXES, ImageArray, load_image_folder, shown
from .inputs import match_inputs
from .labels import check_label_array, check_labels, check_multilabel, class_indices, map_labels, read_classes
from .load import load_dataset
from .preprocess import IMAGE_OPTIONS, MAX_SIDE, ImageOptions, image_options, read_preprocess_file
from .spec import (
    LABELS_KEY,
    MAX_SEED,
    Constant,
    Dataset,
    DataSpec,
    Selection,
    check_selection,
    parse_shard,
    select,
    selected_rows,
)

__all__ = [
    "ENLARGE_WARNING",
    "IMAGE_OPTIONS",
    "IMAGE_SUFFIXES",
    "LABELS_KEY",
    "MAX_SEED",
    "MEMORY_SOURCE",
    "MAX_SIDE",
    "ZEROS",
    "Constant",
    "DataSpec",
    "Dataset",
    "ImageArray",
    "ImageOptions",
    "Selection",
    "check_feeding",
    "check_label_array",
    "check_labels",
    "check_multilabel",
    "check_selection",
    "class_indices",
    "constant_record",
    "file_fingerprint",
    "image_options",
    "load_arrays",
    "load_csv",
    "load_dataset",
    "load_image_folder",
    "load_npy",
    "load_npz",
    "make_constant",
    "map_labels",
    "match_inputs",
    "parse_shard",
    "read_classes",
    "read_npy",
    "read_npz",
    "read_preprocess_file",
    "recorded_feeding",
    "select",
    "selected_rows",
    "shown",
    "with_constants",
]
