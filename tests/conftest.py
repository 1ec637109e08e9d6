"""Shared fixtures: a seeded random generator and paths of the shipped data."""

from __future__ import annotations

import pathlib

import numpy as np
import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]
DEMO_DIR = ROOT / "demo_data"
CONFIG_DIR = ROOT / "configs"
DATA_DIR = pathlib.Path(__file__).resolve().parent / "data"


@pytest.fixture
def rng() -> np.random.Generator:
    """A numpy Generator with a fixed seed (tests never use unseeded randomness)."""
    return np.random.default_rng(20261201)
