"""Randomized settings to try on a subset, and the text syntax that names them.

Syntax (``--settings``): settings separated by ``;``, each ``KIND`` or
``KIND:key=value,key=value`` with

* ``KIND`` one of ``subspace``, ``krylov``, ``one-pass`` (the randomized
  methods of :mod:`rankfold.routes.sketch`);
* ``p`` the oversampling (extra sketch columns beyond the rank, default 10);
* ``q`` the power iterations (default 2; ``one-pass`` takes none).

Example: ``"subspace:p=10,q=2;krylov:q=1;one-pass:p=20"``.
"""

from __future__ import annotations

from dataclasses import dataclass

from rankfold.errors import UsageError
from rankfold.routes.sketch import KINDS, passes

DEFAULT_OVERSAMPLE = 10
DEFAULT_POWER_ITERATIONS = 2
MAX_OVERSAMPLE = 1000
MAX_POWER_ITERATIONS = 50
KEYS = {"p": "oversample", "q": "power_iterations"}


@dataclass(frozen=True)
class Setting:
    """One randomized configuration: method, oversampling ``p``, power iterations ``q``."""

    kind: str
    oversample: int = DEFAULT_OVERSAMPLE
    power_iterations: int = DEFAULT_POWER_ITERATIONS

    @property
    def label(self) -> str:
        if self.kind == "one-pass":
            return f"one-pass p={self.oversample}"
        return f"{self.kind} p={self.oversample} q={self.power_iterations}"

    @property
    def passes(self) -> int:
        """Reads of the data this setting takes (samples stored as rows)."""
        return passes(self.power_iterations, self.kind)

    def params(self) -> dict:
        """Keyword arguments of :func:`rankfold.decompose` for this setting."""
        return {"route": "sketch", "sketch": self.kind, "oversample": self.oversample,
                "power_iterations": self.power_iterations}


def default_settings(oversample: int = DEFAULT_OVERSAMPLE, one_pass: bool = True) -> list[Setting]:
    """The default grid: subspace iteration with q = 0, 1, 2, block Krylov q = 2, one-pass.

    Cheap to run on a subset (at most four reads each) and spanning what matters:
    whether power iterations are needed at all, whether two are enough, and
    whether a slowly decaying spectrum needs Krylov.  ``one_pass`` is False when
    the one-pass sketch cannot run (standardizing or filling missing values).
    """
    grid = [Setting("subspace", oversample, q) for q in (0, 1, 2)] + [Setting("krylov", oversample, 2)]
    if one_pass:
        grid.append(Setting("one-pass", oversample, 0))
    return grid


def parse_settings(text: str) -> list[Setting]:
    """Parse the ``--settings`` syntax (see the module docstring); duplicates are dropped.

    Raises
    ------
    UsageError
        Naming the piece of ``text`` that is wrong and what is allowed.
    """
    if not isinstance(text, str) or not text.strip():
        raise UsageError(f"settings must be text like 'subspace:p=10,q=2;krylov:q=1'; got {text!r}")
    found: list[Setting] = []
    for piece in (p.strip() for p in text.split(";")):
        if not piece:
            continue
        kind, _, rest = piece.partition(":")
        kind = kind.strip()
        if kind not in KINDS:
            raise UsageError(f"settings: unknown method {kind!r} in {piece!r}; use one of {', '.join(KINDS)}")
        values = {"oversample": DEFAULT_OVERSAMPLE,
                  "power_iterations": 0 if kind == "one-pass" else DEFAULT_POWER_ITERATIONS}
        for item in (i.strip() for i in rest.split(",") if i.strip()):
            key, eq, value = item.partition("=")
            key = key.strip()
            if not eq or key not in KEYS:
                raise UsageError(f"settings: {item!r} in {piece!r} is not p=N (oversampling) or q=N "
                                 "(power iterations)")
            if key == "q" and kind == "one-pass":
                raise UsageError(f"settings: {piece!r}: the one-pass sketch reads the data once and has no "
                                 "power iterations; drop q")
            high = MAX_OVERSAMPLE if key == "p" else MAX_POWER_ITERATIONS
            try:
                number = int(value.strip())
            except ValueError:
                number = None
            if number is None or not 0 <= number <= high:
                raise UsageError(f"settings: {key} in {piece!r} must be a whole number from 0 to {high}; "
                                 f"got {value.strip()!r}")
            values[KEYS[key]] = number
        setting = Setting(kind, values["oversample"], values["power_iterations"])
        if setting not in found:
            found.append(setting)
    if not found:
        raise UsageError(f"settings: no setting found in {text!r}; write e.g. 'subspace:p=10,q=2;krylov:q=1'")
    return found


def as_settings(settings) -> list[Setting]:
    """Accept None (default grid decided by the caller), text, or Setting objects / dicts."""
    if isinstance(settings, str):
        return parse_settings(settings)
    out = []
    for s in settings:
        if isinstance(s, Setting):
            out.append(s)
        elif isinstance(s, dict):
            text = s.get("kind", "?") + ":" + ",".join(
                f"{k}={s[v]}" for k, v in KEYS.items() if v in s)
            out.extend(parse_settings(text.rstrip(":")))
        else:
            raise UsageError(f"settings must be text, Setting objects or dicts with kind, oversample, "
                             f"power_iterations; got {s!r}")
    if not out:
        raise UsageError("settings is empty; give at least one randomized setting or None for the default grid")
    return out
