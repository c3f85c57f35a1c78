"""Accuracy and speed benchmarks the project ships (run them with ``benchspec benchmark``).

Each module exposes ``run(quick: bool) -> dict`` returning its figures and the
targets they are measured against.
"""
