"""cairn: next-click recommendations for anonymous visits.

The package has two halves that meet in `model_store/`: `service.offline` (ingest, demo data,
baselines, GRU training, evaluation, export; may import torch) and the serving path
(`service.api`, `service.store`, `service.runtime`, `service.artifacts`; numpy and onnxruntime only).
"""

__version__ = "0.1.0"
