"""Offline half: ingest, demo data, baselines, GRU training, evaluation and export."""
