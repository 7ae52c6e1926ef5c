"""Benchmarks: each script measures one speed or memory target and prints it beside the target."""
