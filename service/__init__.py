"""cairn's serving process: the HTTP API, the session stores, the runtime recommenders, the guards,
and the artifact format it shares with the offline workbench (numpy and ONNX Runtime only).
"""

__version__ = "0.1.0"
