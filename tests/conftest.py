"""Shared test fixtures: the open corpus in ../shared/corpus and small settings."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CORPUS = ROOT.parent / "shared" / "corpus"


def corpus_path(name: str) -> Path:
    """Path of a corpus mesh, skipping the test (with the reason) when it is absent."""
    path = CORPUS / name
    if not path.is_file():
        pytest.skip(f"shared corpus mesh {name} not found at {CORPUS} (it lives beside the checkout, not in it)")
    return path


@pytest.fixture
def corpus():
    """The function :func:`corpus_path`, as a fixture."""
    return corpus_path


@pytest.fixture
def coarse():
    """Default settings on a coarser pixel/layer grid, so end-to-end tests stay quick on 2 cores."""
    from supportgen import Settings

    return Settings().override(pixel_mm=0.1, layer_mm=0.1, tip_min_mm=0.2)
