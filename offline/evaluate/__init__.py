"""Offline evaluation: next-click metrics, the simple baselines, the comparison and its verdict."""
