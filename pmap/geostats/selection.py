"""Which variogram, transform and neighbourhood a property is kriged with, and why.

The rule (``kriging.selection = "cross-validation"``, the default):

1. Candidates are every model family of ``kriging.models``, each fitted twice (nugget free
   above the lab-error floor, and nugget held at that floor), on the values and, where
   allowed, on their logarithms (never for pH; only when every value is > 0).
2. Each candidate is cross-validated by leave-one-out with the kriging the map will use
   (global, or the same neighbourhood), errors in the property's own units after the
   lognormal back-transform, so plain and log candidates are comparable.
3. The lowest RMSE wins; candidates within ``kriging.rmse_tie`` (relative, default 1 %) of
   it count as tied, and among them the one whose MSDR is closest to 1 (smallest
   ``|log MSDR|``) is taken: its variance layer describes its errors best.

``kriging.selection = "sse"`` keeps the earlier rule: the log by sample skewness and the
family with the lowest weighted SSE against the empirical variogram.

Neighbourhood (``kriging.method = "auto"``): global kriging, one dense ``(n, n)`` system,
up to ``kriging.global_max_samples`` samples (default 2,000: about 100 MiB for the matrix,
its inverse and a block); beyond that each cell is kriged from its
``kriging.neighbours`` nearest samples (:mod:`pmap.geostats.neighbourhood`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from pmap.geostats.crossval import CrossValidation
from pmap.geostats.variogram import VariogramModel

__all__ = [
    "SELECTION_RULES",
    "METHODS",
    "Candidate",
    "Neighbourhood",
    "choose_neighbourhood",
    "choose_candidate",
    "variogram_subsample",
    "global_memory_bytes",
]

#: How the model is chosen.
SELECTION_RULES: tuple[str, ...] = ("cross-validation", "sse")
#: Kriging neighbourhoods the pipeline can use.
METHODS: tuple[str, ...] = ("auto", "global", "local")


@dataclass(frozen=True)
class Candidate:
    """One variogram tried for a property, with its fit and cross-validation figures.

    Attributes
    ----------
    log : bool
        Whether the logarithm of the values was kriged.
    model : VariogramModel
        Fitted model, in the kriged units.
    nugget : str
        ``"fitted"`` (free above the lab-error floor) or ``"lab error"`` (held at it).
    wsse : float
        Weighted SSE (weights N_h/h^2) against the empirical variogram it was fitted to.
    cv : CrossValidation or None
        Leave-one-out figures in the property's units; None when not cross-validated.
    skipped : str
        Why the candidate could not be used (e.g. a singular system); empty otherwise.
    drift : str
        The drift of universal / regression kriging (e.g. ``"x, y"`` or ``"elevation"``);
        empty for ordinary kriging.  Its model is the variogram of the residuals.
    """

    log: bool
    model: VariogramModel
    nugget: str
    wsse: float
    cv: CrossValidation | None = None
    skipped: str = ""
    drift: str = ""

    @property
    def label(self) -> str:
        """Short name, e.g. ``"log spherical, nugget fitted"``."""
        aniso = (f", anisotropic {self.model.ratio:.2f} at {self.model.angle:.0f} deg"
                 if self.model.anisotropic else "")
        drift = f", drift {self.drift}" if self.drift else ""
        return (f"{'log ' if self.log else ''}{self.model.kind}, nugget {self.nugget}{aniso}"
                f"{drift}")

    def as_dict(self, chosen: bool = False) -> dict[str, Any]:
        """Plain values for the summary."""
        out: dict[str, Any] = {
            "label": self.label,
            "log": bool(self.log),
            "nugget_option": self.nugget,
            "model": self.model.as_dict(),
            "wsse": float(self.wsse),
            "drift": self.drift or None,
            "chosen": bool(chosen),
        }
        if self.cv is not None:
            out["loo"] = self.cv.as_dict()
        if self.skipped:
            out["skipped"] = self.skipped
        return out


@dataclass(frozen=True)
class Neighbourhood:
    """Global or local kriging, and the reason.

    Attributes
    ----------
    neighbours : int or None
        Samples per target for local kriging; None for global kriging.
    radius : float or None
        Search radius, m (None: no limit).
    reason : str
        The rule that chose it, for the summary.
    """

    neighbours: int | None
    radius: float | None
    reason: str

    @property
    def kind(self) -> str:
        """``"global"`` or ``"local"``."""
        return "global" if self.neighbours is None else "local"

    def as_dict(self) -> dict[str, Any]:
        """Plain values for the summary."""
        return {"kind": self.kind, "neighbours": self.neighbours, "radius_m": self.radius,
                "reason": self.reason}


def global_memory_bytes(n: int) -> int:
    """Memory of global kriging with ``n`` samples: matrix, factor and inverse, bytes."""
    return int(3 * 8 * n * n)


def choose_neighbourhood(
    n: int, *, method: str, neighbours: int, radius: float | None, global_max_samples: int,
) -> Neighbourhood:
    """The neighbourhood of a property with ``n`` samples under ``kriging.method``."""
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    mib = global_memory_bytes(n) / 2**20
    if method == "global":
        return Neighbourhood(None, None, "kriging.method = 'global'")
    if method == "local":
        return Neighbourhood(int(neighbours), radius, "kriging.method = 'local'")
    if n <= global_max_samples:
        return Neighbourhood(None, None, (
            f"{n} samples <= kriging.global_max_samples = {global_max_samples}: global "
            f"kriging (dense system of about {mib:.0f} MiB)"))
    return Neighbourhood(int(neighbours), radius, (
        f"{n} samples > kriging.global_max_samples = {global_max_samples} (a dense system "
        f"would take about {mib:.0f} MiB and O(n^3) time): each cell kriged from its "
        f"{int(neighbours)} nearest samples"))


def choose_candidate(candidates: list[Candidate], tie: float) -> Candidate:
    """The cross-validation choice: lowest LOO RMSE, ties (within ``tie``) by MSDR nearest 1.

    Candidates without figures (skipped) are ignored; raises ValueError if none has any.
    """
    usable = [c for c in candidates if c.cv is not None and not c.skipped
              and np.isfinite(c.cv.rmse)]
    if not usable:
        raise ValueError("no candidate could be cross-validated")
    best = min(c.cv.rmse for c in usable)  # type: ignore[union-attr]
    band = [c for c in usable if c.cv.rmse <= best * (1.0 + tie)]  # type: ignore[union-attr]

    def msdr_distance(c: Candidate) -> float:
        msdr = c.cv.msdr  # type: ignore[union-attr]
        return abs(np.log(msdr)) if np.isfinite(msdr) and msdr > 0 else np.inf

    return min(band, key=lambda c: (msdr_distance(c), c.cv.rmse))  # type: ignore[union-attr]


def variogram_subsample(n: int, max_samples: int, seed: int) -> np.ndarray | None:
    """Sorted indices of a seeded random subsample of ``max_samples``, or None if n is small."""
    if n <= max_samples:
        return None
    rng = np.random.default_rng(seed)
    return np.sort(rng.choice(n, size=int(max_samples), replace=False))
