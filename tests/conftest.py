"""Shared test helpers: signal makers and the location of the shared reference data."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from tests import broker as _broker

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


# ---- MQTT: a real mosquitto per test (tests/broker.py) ----
@pytest.fixture(scope="session")
def pki(tmp_path_factory):
    """A CA, server and client certificate made with the openssl command."""
    import shutil
    if shutil.which("openssl") is None:
        pytest.skip("openssl command not installed (Debian package openssl)")
    return _broker.make_pki(tmp_path_factory.mktemp("pki"))


@pytest.fixture
def mqtt_broker(tmp_path):
    """A fresh mosquitto (plain listener, passwords, ACL) on a free port; stopped afterwards."""
    if not _broker.mosquitto_available():
        pytest.skip("mosquitto not installed (Debian packages mosquitto, mosquitto-clients)")
    b = _broker.Broker(tmp_path / "broker", persistence=True).start()
    yield b
    b.resume()
    b.kill()


@pytest.fixture
def tls_broker(tmp_path, pki):
    """Like mqtt_broker plus a mutual-TLS listener (client certificate required)."""
    if not _broker.mosquitto_available():
        pytest.skip("mosquitto not installed (Debian packages mosquitto, mosquitto-clients)")
    b = _broker.Broker(tmp_path / "tlsbroker", pki=pki).start()
    yield b
    b.kill()


def fill_disk(path: Path) -> None:
    """Write zeros to ``path`` until the file system is full (64 KiB blocks, then 512 B for the rest)."""
    with open(path, "wb", buffering=0) as fh:
        for block in (65536, 512):
            try:
                while True:
                    fh.write(b"\0" * block)
            except OSError:
                pass
