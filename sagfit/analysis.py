"""The whole analysis of one readings set: fit every DUT, then check it.

This is what ``sagfit.fit`` runs and what every command builds on. Pure core: arrays
in, frozen results out.
"""

from __future__ import annotations

from .fit import fit_lines
from .readings import Readings
from .results import Fits

__all__ = ["fit"]


def fit(readings: Readings, *, confidence: float = 0.95, level: float = 0.01,
        current_range: tuple[float, float] | None = None, below_knee: bool = False,
        robust: bool = False) -> Fits:
    """Fit the Thevenin equivalent V = Vth − Rth·I of every DUT in ``readings``.

    Parameters
    ----------
    readings : Readings
        From :func:`sagfit.read_readings` or :meth:`sagfit.Readings.from_arrays`.
    confidence : float
        Level of the confidence intervals (default 0.95).
    level : float
        Significance level of the non-linearity checks (default 0.01).
    current_range : (lo, hi), optional
        Fit only readings with lo ≤ I ≤ hi (A).
    below_knee : bool
        Where a knee is found, refit only the readings below it.
    robust : bool
        Refit with a soft-L1 loss.

    Returns
    -------
    Fits
        Columnar results; ``fits["U17"]`` gives one DUT's :class:`FitResult`.

    See :func:`sagfit.fit.fit_lines` for the method and its references.
    """
    if current_range is not None or below_knee or robust:
        raise NotImplementedError("diagnostic refits are being written (issue 3)")
    fits = fit_lines(readings, confidence=confidence)
    return fits
