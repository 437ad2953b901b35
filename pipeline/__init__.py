"""kaledger: curation and validation pipeline for pKa/Ka reference data."""

from __future__ import annotations

from typing import Any

__all__ = ["Library"]


def __getattr__(name: str) -> Any:
    # ``from pipeline import Library`` without importing DuckDB for every submodule import
    if name == "Library":
        from pipeline.library import Library

        return Library
    raise AttributeError(f"module 'pipeline' has no attribute {name!r}; available: {', '.join(__all__)}")
