"""The linearity checks of every fitted line: is the source really linear over the tested
range, and is each reading consistent with the line?

All checks run on all DUTs at once: per-DUT sums use ``np.bincount`` over the ``group``
array; the order-dependent checks work on dense blocks of the DUTs that share a reading
count, so the only Python loops run over distinct reading counts and over candidate run
counts, never over DUTs. Modules, by kind of check:

- :mod:`.common` — the shared per-DUT state (residuals, weights) and row helpers;
- :mod:`.shape` — curvature (quadratic term) and knee (two-segment line);
- :mod:`.sequence` — runs of residual signs along the current, drift with time or order;
- :mod:`.scatter` — χ² against the stated uncertainties, lack of fit, the slope checks;
- :mod:`.residuals` — outlying readings (externally studentised residuals);
- :mod:`.orchestrate` — :func:`diagnose`: every check, the diagnostics columns, the flags.
"""

from .orchestrate import CODES, diagnose
from .residuals import outlier_limits
from .sequence import runs_test
from .shape import knee_rows, quadratic_fit

__all__ = ["CODES", "diagnose", "knee_rows", "outlier_limits", "quadratic_fit", "runs_test"]
