"""Peer (a): a per-DUT statsmodels WLS loop, what a data-savvy engineer writes today.

Usage: python statsmodels_loop.py IN.csv OUT.csv PERCENT OFFSET_V
"""

import sys

import numpy as np
import pandas as pd
import statsmodels.api as sm

src, dst, pct, off = sys.argv[1], sys.argv[2], float(sys.argv[3]), float(sys.argv[4])
df = pd.read_csv(src, comment="#")
df["load"] = pd.to_numeric(df["load_ohm"], errors="coerce").fillna(np.inf)
rows = []
for dut, g in df.groupby("dut", sort=False):
    v = g["voltage_V"].to_numpy(float)
    r = g["load"].to_numpy(float)
    i = np.where(np.isinf(r), 0.0, v / r)
    u = (pct / 100 * np.abs(v) + off) / np.sqrt(3)
    fit = sm.WLS(v, sm.add_constant(i), weights=1 / u ** 2).fit()
    (a, b), (ua, ub) = fit.params, fit.bse
    lo, hi = fit.conf_int(0.05).T
    rows.append((dut, "wls", len(v), a, ua, lo[0], hi[0], -b, ub, -hi[1], -lo[1], ""))
pd.DataFrame(rows, columns=["dut", "method", "n", "vth", "vth_u", "vth_ci_low", "vth_ci_high",
                            "rth", "rth_u", "rth_ci_low", "rth_ci_high", "flags"]
             ).to_csv(dst, index=False, float_format="%.10g")
