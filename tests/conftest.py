"""Shared test helpers: signal makers and the location of the shared reference data."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


def find_shared_data() -> Path | None:
    """The shared reference data folder (``../shared/data`` beside the project), or None."""
    for parent in [ROOT, *ROOT.parents]:
        cand = parent / "shared" / "data"
        if (cand / "bearings").is_dir():
            return cand
    return None


SHARED_DATA = find_shared_data()


@pytest.fixture
def shared_data() -> Path:
    if SHARED_DATA is None:
        pytest.skip("shared reference data (../shared/data) is not present beside the project")
    return SHARED_DATA


def tone(fs_hz: float, f_hz: float, amp_rms: float, n: int, phase_rad: float = 0.0) -> np.ndarray:
    """A sine of r.m.s. amplitude ``amp_rms``."""
    t = np.arange(n) / fs_hz
    return np.sqrt(2.0) * amp_rms * np.sin(2 * np.pi * f_hz * t + phase_rad)
