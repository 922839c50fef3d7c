"""An invented plant-breeding panel with planted population structure.

Every line of the panel descends from one of a handful of founder
populations; a minority are crosses between two founders.  Founder allele
frequencies drift away from a shared ancestral frequency (Balding-Nichols
model), so lines of the same founder share allele frequencies and the leading
principal components of the dosage table separate the founders.

The table is stored marker-major (one row per marker, one column per line), as
genotype stores usually are, so the lines are the *columns*: the decomposition
runs with ``samples_as="columns"``.
"""

from __future__ import annotations

import dataclasses
import json
import os
from pathlib import Path

import numpy as np
import zarr

from rankfold.demo._staging import staged_directory
from rankfold.errors import UsageError

MISSING_CODE = -1
"""Dosage value that marks a failed call."""

_KIND = "rankfold-demo-panel"
_VERSION = 1  # bump when the generator changes, so stale stores are rebuilt
_CHUNK_BYTES = 3_000_000  # int8 chunks of ~3 MB: big enough to stream well, small to hold
_LINKAGE_GROUPS = 12
_MARKER_SPACING = 4_000  # mean distance between markers, in base pairs


@dataclasses.dataclass(frozen=True, eq=False)
class PanelTruth:
    """What was planted in a generated panel.

    Attributes
    ----------
    path : str
        Path of the 2-D dosage array (``<group>/dosage``), ready for decomposition.
    line_ids : numpy.ndarray
        Line identifiers, in column order.
    founder : numpy.ndarray
        Founder (``0 .. n_founders-1``) contributing most to each line.
    founder_share : numpy.ndarray
        Share of the genome from `founder`: 1.0 for pure lines, 0.5-0.9 for crosses.
    second_founder : numpy.ndarray
        The other parent founder of a cross, ``-1`` for pure lines.
    n_founders : int
        Number of founder populations.
    n_markers : int
        Number of markers (rows of the dosage array).
    parameters : dict
        The generator's parameters, as stored in the group attributes.
    """

    path: str
    line_ids: np.ndarray
    founder: np.ndarray
    founder_share: np.ndarray
    second_founder: np.ndarray
    n_founders: int
    n_markers: int
    parameters: dict

    @property
    def admixed(self) -> np.ndarray:
        """Boolean mask of lines that are crosses between two founders."""
        return self.second_founder >= 0


def panel_parameters(
    *,
    n_lines: int = 1500,
    n_markers: int = 20_000,
    n_founders: int = 5,
    missing_rate: float = 0.01,
    admixed_rate: float = 0.1,
    fst: float = 0.1,
    seed: int = 20261202,
    chunk_markers: int | None = None,
) -> dict:
    """Check and collect the generator parameters in their stored form.

    Parameters
    ----------
    n_lines, n_markers, n_founders, missing_rate, admixed_rate, fst, seed, chunk_markers
        See :func:`write_panel`.

    Returns
    -------
    dict
        JSON-ready parameters, also used to recognise an up-to-date store.

    Raises
    ------
    UsageError
        If a parameter is out of range.
    """
    if n_founders < 2:
        raise UsageError("n_founders must be at least 2")
    if n_lines < n_founders or n_markers < 1:
        raise UsageError("need at least one line per founder and at least one marker")
    if chunk_markers is not None and chunk_markers < 1:
        raise UsageError("chunk_markers must be positive")
    if not (0.0 <= missing_rate < 1.0 and 0.0 <= admixed_rate <= 1.0 and 0.0 < fst < 1.0):
        raise UsageError("missing_rate must be in [0, 1), admixed_rate in [0, 1], fst in (0, 1)")
    return {
        "kind": _KIND,
        "version": _VERSION,
        "n_lines": int(n_lines),
        "n_markers": int(n_markers),
        "n_founders": int(n_founders),
        "missing_rate": float(missing_rate),
        "admixed_rate": float(admixed_rate),
        "fst": float(fst),
        "seed": int(seed),
        # Each chunk has its own random stream, so the chunking is part of
        # what defines the data.
        "chunk_markers": int(min(n_markers, chunk_markers or max(1, _CHUNK_BYTES // n_lines))),
    }


def _line_ids(n_lines: int) -> np.ndarray:
    width = max(4, len(str(n_lines)))
    return np.array([f"L{i + 1:0{width}d}" for i in range(n_lines)])


def _marker_names(start: int, stop: int, n_markers: int) -> np.ndarray:
    """Names ``lgGG_PPPPPPPPP`` (linkage group, position in bp), unique and sorted.

    Computed from the marker index alone, so any chunk can be named on its own.
    """
    index = np.arange(start, stop)
    group = index * _LINKAGE_GROUPS // n_markers
    first_in_group = -(-group * n_markers // _LINKAGE_GROUPS)  # ceil division
    rank = index - first_in_group
    # Irregular but strictly increasing positions without another random stream:
    # the jitter is smaller than the spacing, so positions never collide.
    jitter = (rank * 2_654_435_761) % (_MARKER_SPACING // 2)
    position = 1_000 + rank * _MARKER_SPACING + jitter
    return np.array([f"lg{g + 1:02d}_{p:09d}" for g, p in zip(group, position)])


def _design_lines(params: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Founder, founder share and second founder of each line.

    Uses its own random stream (``[seed, 0]``) so the truth can be rebuilt from
    the stored parameters without regenerating any dosage.
    """
    rng = np.random.default_rng([params["seed"], 0])
    n, k = params["n_lines"], params["n_founders"]
    # Founder groups of unequal size, as in a real breeding programme; the
    # first k lines are pure lines of each founder, so every founder keeps a
    # reference group however small the panel.
    weights = rng.dirichlet(np.full(k, 4.0))
    founder = np.concatenate([np.arange(k), rng.choice(k, size=n - k, p=weights)])
    admixed = rng.random(n) < params["admixed_rate"]
    admixed[:k] = False
    other = (founder + rng.integers(1, k, size=n)) % k  # any founder but its own
    founder_share = np.where(admixed, rng.uniform(0.5, 0.9, size=n), 1.0)
    second = np.where(admixed, other, -1)
    order = rng.permutation(n)
    founder, founder_share, second = founder[order], founder_share[order], second[order]
    return founder.astype(np.int64), founder_share, second.astype(np.int64)


def _mixing_matrix(founder, founder_share, second, n_founders) -> np.ndarray:
    """Lines x founders matrix of genome shares (rows sum to one)."""
    rows = np.arange(founder.size)
    mix = np.zeros((founder.size, n_founders), dtype=np.float32)
    mix[rows, founder] = founder_share
    crossed = second >= 0
    mix[rows[crossed], second[crossed]] = 1.0 - founder_share[crossed]
    return mix


def _dosage_chunk(params: dict, mix: np.ndarray, chunk_index: int, n_rows: int) -> np.ndarray:
    """Simulate ``n_rows`` markers for all lines, from the chunk's own seed.

    A separate stream per chunk keeps memory bounded at any scale and makes each
    chunk reproducible on its own.
    """
    rng = np.random.default_rng([params["seed"], 1, chunk_index])
    fst = params["fst"]
    ancestral = rng.uniform(0.05, 0.95, size=n_rows)
    # Balding-Nichols: founder frequencies scatter around the ancestral one
    # with variance fst * p * (1 - p).
    a = ancestral * (1 - fst) / fst
    b = (1 - ancestral) * (1 - fst) / fst
    founder_freq = rng.beta(a, b, size=(params["n_founders"], n_rows)).astype(np.float32)
    line_freq = founder_freq.T @ mix.T  # markers x lines
    shape = line_freq.shape
    # Binomial(2, f) is the sum of two Bernoulli(f) draws; uniform float32 draws
    # are several times faster than numpy's array-parameter binomial.
    dosage = (rng.random(shape, dtype=np.float32) < line_freq).astype(np.int8)
    dosage += rng.random(shape, dtype=np.float32) < line_freq
    dosage[rng.random(shape, dtype=np.float32) < params["missing_rate"]] = MISSING_CODE
    return dosage


def _truth(path: Path, params: dict) -> PanelTruth:
    founder, share, second = _design_lines(params)
    return PanelTruth(
        path=f"{path}/dosage",
        line_ids=_line_ids(params["n_lines"]),
        founder=founder,
        founder_share=share,
        second_founder=second,
        n_founders=params["n_founders"],
        n_markers=params["n_markers"],
        parameters=params,
    )


def write_panel(
    path: str | os.PathLike,
    *,
    n_lines: int = 1500,
    n_markers: int = 20_000,
    n_founders: int = 5,
    missing_rate: float = 0.01,
    admixed_rate: float = 0.1,
    fst: float = 0.1,
    seed: int = 20261202,
    chunk_markers: int | None = None,
    overwrite: bool = False,
) -> PanelTruth:
    """Generate the breeding panel as a Zarr v3 group.

    Parameters
    ----------
    path : str or os.PathLike
        Folder of the Zarr group to create, e.g. ``"panel.zarr"``.
    n_lines : int
        Number of breeding lines (columns of the dosage array).
    n_markers : int
        Number of markers (rows).
    n_founders : int
        Number of founder populations.
    missing_rate : float
        Probability that a call is missing (stored as ``-1``).
    admixed_rate : float
        Probability that a line is a cross between two founders.
    fst : float
        Differentiation of founders from the ancestral population.
    seed : int
        Seed of every random stream; the same seed gives the same store.
    chunk_markers : int, optional
        Markers per stored chunk (each chunk holds all lines).  Default: chunks
        of about 3 MB, e.g. 2,000 markers for 1,500 lines.
    overwrite : bool
        Replace `path` if it exists.

    Returns
    -------
    PanelTruth
        The planted founder structure and the path of the dosage array.

    Notes
    -----
    The group holds ``dosage`` (int8, markers x lines, dimension names
    ``("marker", "line")``), the coordinates ``marker`` and ``line``, and the
    per-line labels ``founder`` and ``founder_share`` along ``line``.
    """
    params = panel_parameters(
        n_lines=n_lines, n_markers=n_markers, n_founders=n_founders, missing_rate=missing_rate,
        admixed_rate=admixed_rate, fst=fst, seed=seed, chunk_markers=chunk_markers,
    )
    truth = _truth(Path(path), params)
    mix = _mixing_matrix(truth.founder, truth.founder_share, truth.second_founder, n_founders)
    rows_per_chunk = params["chunk_markers"]
    with staged_directory(path, overwrite=overwrite) as scratch:
        group = zarr.open_group(scratch, mode="w", zarr_format=3)
        # fill_value -1: a chunk that is never written reads as missing, not as 0.
        dosage = group.create_array(
            "dosage", shape=(n_markers, n_lines), chunks=(rows_per_chunk, n_lines),
            dtype="int8", fill_value=MISSING_CODE, dimension_names=("marker", "line"),
        )
        markers = group.create_array(
            "marker", shape=(n_markers,), chunks=(rows_per_chunk,), dtype=str,
            dimension_names=("marker",),
        )
        for index, start in enumerate(range(0, n_markers, rows_per_chunk)):
            stop = min(start + rows_per_chunk, n_markers)
            dosage[start:stop] = _dosage_chunk(params, mix, index, stop - start)
            markers[start:stop] = _marker_names(start, stop, n_markers)
        # dtype=str stores variable-length UTF-8 (the Zarr v3 "string" type);
        # numpy's fixed-width "<U" type has no stable v3 specification.
        per_line = (("line", truth.line_ids, str), ("founder", truth.founder, "int8"),
                    ("founder_share", truth.founder_share, "float32"))
        for name, values, dtype in per_line:
            array = group.create_array(name, shape=(n_lines,), dtype=dtype, dimension_names=("line",))
            array[:] = values
        # Parameters go last: a store that has them was written completely.
        group.attrs.update({
            "description": (
                "Invented breeding panel: allele dosages (0, 1, 2) of lines descended "
                f"from {n_founders} founder populations; rows are markers, columns are lines."
            ),
            "missing_code": MISSING_CODE,
            "rankfold_demo": params,
        })
    return truth


def stored_panel_parameters(path: str | os.PathLike) -> dict | None:
    """Parameters of a panel written by :func:`write_panel`, or None.

    Parameters
    ----------
    path : str or os.PathLike
        Folder of the Zarr group.

    Returns
    -------
    dict or None
        The stored parameters; None when `path` is not a finished demo panel.
    """
    try:
        attrs = zarr.open_group(path, mode="r").attrs.asdict()
    except Exception:  # any unreadable or foreign store simply is not ours
        return None
    params = attrs.get("rankfold_demo")
    if not isinstance(params, dict) or params.get("kind") != _KIND:
        return None
    return json.loads(json.dumps(params))  # plain dict, detached from the store


def read_panel_truth(path: str | os.PathLike) -> PanelTruth:
    """Rebuild the planted structure of an existing demo panel.

    Parameters
    ----------
    path : str or os.PathLike
        Folder of the Zarr group written by :func:`write_panel`.

    Returns
    -------
    PanelTruth

    Raises
    ------
    UsageError
        If `path` is not a demo panel.
    """
    params = stored_panel_parameters(path)
    if params is None:
        raise UsageError(f"{path} is not a panel written by rankfold.demo")
    return _truth(Path(path), params)
