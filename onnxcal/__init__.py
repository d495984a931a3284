"""onnxcal: temperature-scale an exported ONNX classifier and patch its graph."""

__version__ = "0.1.0"
