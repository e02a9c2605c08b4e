"""The whole analysis of one readings set: fit every DUT, then check it.

This is what ``sagfit.fit`` runs and what every command builds on. Pure core: arrays
in, frozen results out.
"""

from __future__ import annotations

from .fit import fit_lines
from .readings import Readings
from .results import Fits

__all__ = ["fit"]


def fit(readings: Readings, *, confidence: float = 0.95) -> Fits:
    """Fit the Thevenin equivalent V = Vth − Rth·I of every DUT in ``readings``.

    Parameters
    ----------
    readings : Readings
        From :func:`sagfit.read_readings` or :meth:`sagfit.Readings.from_arrays`.
    confidence : float
        Level of the confidence intervals (default 0.95).

    Returns
    -------
    Fits
        Columnar results; ``fits["U17"]`` gives one DUT's :class:`FitResult`.

    See :func:`sagfit.fit.fit_lines` for the method and its references.
    """
    fits = fit_lines(readings, confidence=confidence)
    return fits
