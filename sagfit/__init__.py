"""sagfit: the Thevenin/Norton equivalent of a DC source from bench readings.

>>> import sagfit
>>> readings = sagfit.read_readings("sample_runs/pack_a.csv", load_tolerance=1.0,
...                                 voltage_accuracy=sagfit.parse_accuracy("0.015%+2mV", "V"))
>>> fits = sagfit.fit(readings)
>>> fits[0]                                                        # doctest: +SKIP
<FitResult pack_a Vth=12.7396±0.0013 V Rth=21.53±0.15 mΩ york>
"""

from .core.acceptance import accept
from .core.analysis import fit
from .core.errors import (FitError, HistoryError, InputError, OptionError, ReadingsFileError,
                     SagfitError, SpecFileError)
from .core.fit import york_line
from .core.pulse import find_pulses
from .core.rc_model import fit_pulses, predict_voltage
from .core.trace import Trace, find_steps, steps_to_readings
from .io.readings_csv import read_readings
from .io.spec import read_spec
from .io.trace_file import read_trace
from .core.readings import Readings
from .core.results import Estimate, FitResult, Fits, Flag
from .core.units import Accuracy, parse_accuracy
from .io import tables as _tables  # noqa: F401  (gives Fits.to_dataframe its pandas view)

__version__ = "0.1.0"

for _obj in (fit, york_line, read_readings, read_spec, accept, Readings, Estimate, FitResult,
             Fits, Flag, Accuracy, parse_accuracy, read_trace, Trace, find_steps,
             steps_to_readings, find_pulses, fit_pulses, predict_voltage):
    try:
        _obj.__module__ = "sagfit"
    except (AttributeError, TypeError):
        pass
del _obj

__all__ = ["__version__", "fit", "york_line", "read_readings", "read_spec", "accept",
           "Readings", "Estimate",
           "FitResult", "Fits", "Flag", "Accuracy", "parse_accuracy", "SagfitError",
           "InputError", "ReadingsFileError", "SpecFileError", "OptionError", "FitError",
           "HistoryError", "read_trace", "Trace", "find_steps", "steps_to_readings",
           "find_pulses", "fit_pulses", "predict_voltage", "plots"]


def __getattr__(name):
    # ``sagfit.plots``: the figure functions, loaded on first use (matplotlib itself only
    # when a figure is drawn), so ``import sagfit`` stays lean
    if name == "plots":
        from .report import plots

        return plots
    raise AttributeError(f"module 'sagfit' has no attribute {name!r}")
