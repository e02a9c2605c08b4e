"""Results as pandas DataFrames, for notebooks and scripts (``Fits.to_dataframe()``).

Edge module: the core keeps no pandas; this module registers its builder with
:mod:`sagfit.core.results` when imported (``import sagfit`` imports it). pandas itself
is imported only when a table is built.
"""

from __future__ import annotations

from ..core.results import register_dataframe_builder
from .results_csv import Coded, fits_columns

__all__ = ["fits_dataframe"]


def fits_dataframe(fits):
    """One row per DUT with the columns of ``results.csv`` (the text as it is: unlike the
    CSV, no cell is neutralised against spreadsheet formulas)."""
    import pandas as pd

    cols = fits_columns(fits)
    return pd.DataFrame({name: list(col) if isinstance(col, Coded) else col
                         for name, col in cols.items()})


register_dataframe_builder(fits_dataframe)
