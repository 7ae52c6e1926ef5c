"""The recommenders the service runs: numpy and onnxruntime only, never torch."""

from service.runtime.onnx_step import OnnxStep

__all__ = ["OnnxStep"]
