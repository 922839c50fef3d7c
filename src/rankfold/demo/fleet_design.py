"""Channels, planted modes and latent signals of the invented machine fleet.

Every channel is modelled in *standardized* units first::

    z[t, c] = sum over modes m of  signal_m[t] * loading_m[c]  +  noise[t, c]

with each mode signal of unit variance and noise of variance
``1 - communality[c]``, so every channel has unit variance and the
correlation matrix is ``sum_m loading_m loading_m^T + diag(noise)``.  The
loading vectors are made exactly orthogonal, which makes their directions the
leading eigenvectors of that matrix: correlation PCA should find them.  Only
afterwards is each channel put in its physical unit (``mean + spread * z``),
with means and spreads so different that unscaled PCA would see little more
than the hydraulic pressures.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

MODES = ("weather", "workload", "oil_wear")
"""Names of the planted modes, in the order they are made orthogonal."""

MODE_DESCRIPTIONS = {
    "weather": "the site's ambient temperature, its daily and seasonal swing",
    "workload": "each machine's job schedule, its duty cycle",
    "oil_wear": "oil ageing between services",
}

RECORDS_PER_DAY = 144  # one record every ten minutes

# name, unit, typical value, spread, loading on (weather, workload, oil_wear),
# relative number of channels.  The supports barely overlap, which keeps the
# exact orthogonalization below a small correction of a physical story.
SUBSYSTEMS = (
    ("ambient_temp", "degC", 14.0, 7.0, (0.90, 0.00, 0.00), 1.0),
    ("intake_air_temp", "degC", 27.0, 5.0, (0.80, 0.00, 0.00), 1.5),
    ("humidity", "percent", 62.0, 12.0, (-0.60, 0.00, 0.00), 1.0),
    ("coolant_flow", "l_per_min", 118.0, 9.0, (0.60, 0.00, 0.00), 2.0),
    ("coolant_temp", "degC", 44.0, 3.0, (0.30, 0.40, 0.00), 2.0),
    ("bearing_temp", "degC", 61.0, 4.0, (0.00, 0.60, 0.00), 3.0),
    ("winding_temp", "degC", 86.0, 6.0, (0.00, 0.70, 0.00), 2.0),
    ("motor_current", "A", 142.0, 22.0, (0.00, 0.85, 0.00), 2.0),
    ("hydraulic_pressure", "Pa", 3.2e5, 1.5e4, (0.00, 0.70, 0.00), 2.0),
    ("spindle_speed", "rpm", 1790.0, 35.0, (0.00, 0.60, 0.00), 1.0),
    ("vibration_rms", "mm_per_s", 2.4, 0.35, (0.00, 0.40, 0.40), 3.0),
    ("oil_filter_dp", "kPa", 36.0, 5.0, (0.00, 0.00, 0.75), 1.0),
    ("oil_viscosity", "cSt", 46.0, 2.5, (-0.40, 0.00, -0.50), 1.0),
    ("supply_voltage", "V", 401.0, 3.0, (0.00, 0.00, 0.00), 1.0),
)

# Subsystems where a developing fault shows: the drive train.
DRIFT_SUBSYSTEMS = ("bearing_temp", "winding_temp", "vibration_rms")
MAX_COMMUNALITY = 0.9  # leave every channel some noise of its own


def allocate_channels(n_channels: int) -> list[int]:
    """Split `n_channels` among the subsystems (largest remainder, at least one each)."""
    shares = np.array([row[5] for row in SUBSYSTEMS])
    spare = n_channels - len(SUBSYSTEMS)
    ideal = spare * shares / shares.sum()
    counts = np.floor(ideal).astype(int)
    counts[np.argsort(counts - ideal)[: spare - counts.sum()]] += 1
    return (counts + 1).tolist()


def design_channels(n_channels: int, rng: np.random.Generator) -> dict:
    """Names, units, physical scale and orthogonal mode loadings of every channel.

    Parameters
    ----------
    n_channels : int
        Number of sensor channels, at least one per subsystem.
    rng : numpy.random.Generator
        Stream for the per-channel jitter of loadings and scales.

    Returns
    -------
    dict
        ``names``, ``units``, ``subsystem`` (index per channel), ``mean``,
        ``spread``, ``resolution`` (arrays over channels) and ``loadings`` (modes x channels,
        mutually orthogonal, in standardized units).
    """
    names, units, subsystem, mean, spread, raw = [], [], [], [], [], []
    for index, (count, row) in enumerate(zip(allocate_channels(n_channels), SUBSYSTEMS)):
        name, unit, level, scale, loading, _ = row
        for k in range(count):
            names.append(f"{name}_{k + 1:02d}")
            units.append(unit)
            subsystem.append(index)
            # Sensors of one kind differ a little in where they sit and how
            # strongly each effect reaches them.
            mean.append(level * rng.uniform(0.9, 1.1))
            spread.append(scale * rng.uniform(0.8, 1.25))
            raw.append(np.asarray(loading) * rng.uniform(0.75, 1.25, size=len(MODES)))
    loadings = np.array(raw).T
    # Gram-Schmidt in the order of MODES: the later modes give up the little
    # they share with the earlier ones, so the planted directions are exactly
    # orthogonal and each is an eigenvector of the model correlation matrix.
    for m in range(1, len(MODES)):
        for earlier in range(m):
            unit_vector = loadings[earlier] / np.linalg.norm(loadings[earlier])
            loadings[m] -= (loadings[m] @ unit_vector) * unit_vector
    communality = (loadings**2).sum(axis=0)
    if communality.max() > MAX_COMMUNALITY:
        # One common factor for all modes keeps them orthogonal.
        loadings *= np.sqrt(MAX_COMMUNALITY / communality.max())
    spread = np.array(spread)
    return {
        "names": names,
        "units": units,
        "subsystem": np.array(subsystem),
        "mean": np.array(mean),
        "spread": spread,
        # Sensors report on a fixed grid, between 1/1000 and 1/100 of their
        # spread: realistic, and it lets Parquet dictionary-encode the values
        # (files about a third the size of unrounded float32).
        "resolution": 10.0 ** np.floor(np.log10(spread / 100.0)),
        "loadings": loadings,
    }


def drift_direction(channels: dict, rng: np.random.Generator) -> np.ndarray:
    """Unit direction (standardized units) of one machine's developing fault.

    A random handful of drive-train channels rise together; the part of that
    rise that any planted mode could explain is removed, so the fault lives
    entirely outside the shared pattern and shows as reconstruction error.
    """
    wanted = [i for i, row in enumerate(SUBSYSTEMS) if row[0] in DRIFT_SUBSYSTEMS]
    candidates = np.flatnonzero(np.isin(channels["subsystem"], wanted))
    size = min(candidates.size, max(3, candidates.size // 4))
    direction = np.zeros(len(channels["names"]))
    direction[rng.choice(candidates, size=size, replace=False)] = rng.uniform(0.6, 1.0, size=size)
    for loading in channels["loadings"]:
        unit_vector = loading / np.linalg.norm(loading)
        direction -= (direction @ unit_vector) * unit_vector
    return direction / np.linalg.norm(direction)


def weather_signal(n_records: int, start_day_of_year: float, rng: np.random.Generator) -> np.ndarray:
    """Shared ambient-temperature signal of the site, standardized over the records.

    Daily swing peaking mid-afternoon, a seasonal cycle, and weather fronts as
    a smooth random process lasting a few days.
    """
    hours = np.arange(n_records) / 6.0
    days = hours / 24.0
    daily = np.sin(2 * np.pi * (hours - 9.0) / 24.0)
    seasonal = 2.5 * -np.cos(2 * np.pi * (start_day_of_year + days - 20.0) / 365.25)
    # First-order autoregression with a ~2.5-day memory, run by lfilter (C loop).
    keep = np.exp(-1.0 / (2.5 * RECORDS_PER_DAY))
    fronts = lfilter([np.sqrt(1 - keep**2)], [1.0, -keep], rng.standard_normal(n_records))
    signal = daily + seasonal + 1.2 * fronts
    return (signal - signal.mean()) / signal.std()


def workload_signal(n_records: int, rng: np.random.Generator) -> np.ndarray:
    """One machine's utilization as jobs of random length and level, standardized.

    Jobs run around the clock, so the workload is not tied to the time of day
    (and thus not to the weather's daily swing).  Each machine has its own duty
    level and idle habit, which spreads the machines along this mode.
    """
    duty = rng.uniform(0.45, 0.85)
    idle_rate = rng.uniform(0.08, 0.25)
    lengths = 1 + rng.geometric(1 / 18.0, size=n_records // 4 + 8)  # ~3-hour jobs
    while lengths.sum() < n_records:  # rare: top up until the record span is covered
        lengths = np.concatenate([lengths, 1 + rng.geometric(1 / 18.0, size=n_records // 4 + 8)])
    level = np.clip(rng.normal(duty, 0.18, size=lengths.size), 0.15, 1.0)
    level[rng.random(lengths.size) < idle_rate] = 0.0
    utilization = np.repeat(level, lengths)[:n_records]
    # Thermal and hydraulic inertia: a machine takes a few records to settle.
    utilization = lfilter([0.5], [1.0, -0.5], utilization, zi=[0.5 * utilization[0]])[0]
    # Fleet-wide constants (not this machine's own statistics), so machines
    # with heavier duty really sit higher on the mode.
    return (utilization - 0.55) / 0.3


def oil_wear_signal(n_records: int, rng: np.random.Generator) -> np.ndarray:
    """Oil age as a sawtooth reset at each service, standardized.

    Services come every 14-24 days at a random phase per machine.
    """
    interval = rng.uniform(14, 24) * RECORDS_PER_DAY
    age = ((np.arange(n_records) + rng.uniform(0, interval)) % interval) / interval
    return (age - 0.5) * np.sqrt(12.0)  # a uniform [0, 1) has variance 1/12
