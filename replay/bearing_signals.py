"""Synthetic rolling-element bearing faults for tests and the validation table.

The usual model of a localised defect (P. D. McFadden, J. D. Smith, J. Sound
Vib. 96(1), 1984; Randall & Antoni, MSSP 25(2), 2011, §2.1): every time a
rolling element meets the defect an impact rings a structural resonance; the
impacts repeat at the defect frequency with 1-2 % random jitter (slip), and
their strength is modulated by the load zone — at 1X for an inner-race
defect (it turns with the shaft), at FTF for a rolling-element defect (it
turns with the cage), not at all for an outer-race defect in a fixed load
zone. Shaft harmonics (1X, 2X, 3X) are added, stronger than the bearing
signal, as the discrete part the pre-whitening has to remove, and white
Gaussian noise sets the signal-to-noise ratio (bearing signal power ÷ noise
power over the whole band, dB).
"""

from __future__ import annotations

import numpy as np

from agent.kinematics import BearingOrders



def defect_order(orders: BearingOrders, defect: str) -> float:
    if defect == "outer":
        return orders.bpfo
    if defect == "inner":
        return orders.bpfi
    if defect == "ball":
        return 2.0 * orders.bsf
    raise ValueError(f"defect must be 'outer', 'inner' or 'ball', got {defect!r}")


def bearing_fault_signal(
    defect: str | None,
    snr_db: float,
    orders: BearingOrders,
    *,
    seed: int = 0,
    fs_hz: float = 25600.0,
    n: int = 65536,
    speed_hz: float = 25.0,
    resonance_hz: float = 3300.0,
    damping: float = 0.05,
    jitter: float = 0.01,
    shaft_to_bearing: float = 3.0,
) -> np.ndarray:
    """Acceleration (arbitrary unit) of one capture with a defect (``None`` = healthy).

    For ``defect=None`` the noise has the power it would have at ``snr_db``
    with an outer-race fault present, so healthy and faulty captures match.
    """
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs_hz
    # impulse train with random jitter of the spacing (slip)
    name = defect or "outer"
    f_def = defect_order(orders, name) * speed_hz
    period = 1.0 / f_def
    count = int(n / fs_hz / period) + 2
    gaps = period * (1.0 + jitter * rng.standard_normal(count))
    times = rng.uniform(0, period) + np.concatenate(([0.0], np.cumsum(gaps)[:-1]))
    times = times[times < n / fs_hz]
    if name == "inner":
        amp = 0.5 * (1.0 + np.cos(2 * np.pi * speed_hz * times))
    elif name == "ball":
        amp = 0.5 * (1.0 + np.cos(2 * np.pi * orders.ftf * speed_hz * times))
    else:
        amp = np.ones_like(times)
    train = np.zeros(n)
    np.add.at(train, np.minimum((times * fs_hz).astype(int), n - 1), amp)
    tr = np.arange(int(8.0 / (2 * np.pi * resonance_hz * damping) * fs_hz)) / fs_hz
    wd = 2 * np.pi * resonance_hz * np.sqrt(1 - damping**2)
    h = np.exp(-2 * np.pi * resonance_hz * damping * tr) * np.sin(wd * tr)
    bearing = np.convolve(train, h)[:n]
    p_b = float(np.mean(bearing**2))
    noise = rng.standard_normal(n) * np.sqrt(p_b / 10 ** (snr_db / 10.0))
    shaft = np.zeros(n)
    for k, rel in ((1, 1.0), (2, 0.5), (3, 0.3)):
        shaft += rel * np.sin(2 * np.pi * k * speed_hz * t + rng.uniform(0, 2 * np.pi))
    shaft *= shaft_to_bearing * np.sqrt(p_b) / np.sqrt(np.mean(shaft**2))
    return (bearing if defect else 0.0) + shaft + noise
