"""sagfit: the Thevenin/Norton equivalent of a DC source from bench readings.

>>> import sagfit
>>> readings = sagfit.read_readings("sample_runs/pack_a.csv", load_tolerance=1.0,
...                                 voltage_accuracy=sagfit.parse_accuracy("0.015%+2mV", "V"))
>>> fits = sagfit.fit(readings)
>>> fits[0]                                                        # doctest: +SKIP
<FitResult pack_a Vth=12.7396±0.0013 V Rth=21.53±0.15 mΩ york>
"""

from .acceptance import accept
from .analysis import fit
from .errors import (FitError, HistoryError, InputError, OptionError, ReadingsFileError,
                     SagfitError, SpecFileError)
from .fit import york_line
from .io_csv import read_readings
from .io_spec import read_spec
from .readings import Readings
from .results import Estimate, FitResult, Fits, Flag
from .units import Accuracy, parse_accuracy

__version__ = "0.1.0"

for _obj in (fit, york_line, read_readings, read_spec, accept, Readings, Estimate, FitResult,
             Fits, Flag, Accuracy, parse_accuracy):
    try:
        _obj.__module__ = "sagfit"
    except (AttributeError, TypeError):
        pass
del _obj

__all__ = ["__version__", "fit", "york_line", "read_readings", "read_spec", "accept",
           "Readings", "Estimate",
           "FitResult", "Fits", "Flag", "Accuracy", "parse_accuracy", "SagfitError",
           "InputError", "ReadingsFileError", "SpecFileError", "OptionError", "FitError",
           "HistoryError"]
