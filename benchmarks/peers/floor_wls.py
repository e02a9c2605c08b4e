"""Peer (b): the hand-vectorised numpy WLS floor.

What a careful engineer writes by hand: read the CSV with pandas, I = V/R, weights from
the voltmeter spec, closed-form weighted sums per DUT with np.bincount, write the same
required result columns as ``sagfit fit --out`` (dut, method, n, vth, vth_u, vth_ci_low,
vth_ci_high, rth, rth_u, rth_ci_low, rth_ci_high, flags). No validation, no diagnostics,
no errors in the current: the floor sagfit is measured against.

Usage: python floor_wls.py IN.csv OUT.csv PERCENT OFFSET_V
"""

import sys

import numpy as np
import pandas as pd

src, dst, pct, off = sys.argv[1], sys.argv[2], float(sys.argv[3]), float(sys.argv[4])
df = pd.read_csv(src, comment="#")
codes, names = pd.factorize(df["dut"])
r = pd.to_numeric(df["load_ohm"], errors="coerce").fillna(np.inf).to_numpy()
v = df["voltage_V"].to_numpy(dtype=float)
i = np.where(np.isinf(r), 0.0, v / r)
u = (pct / 100 * np.abs(v) + off) / np.sqrt(3)
w = 1 / u ** 2
m = len(names)


def s(x):
    return np.bincount(codes, weights=x, minlength=m)


sw, sx, sy = s(w), s(w * i), s(w * v)
xm, ym = sx / sw, sy / sw
dx = i - xm[codes]
sxx = s(w * dx * dx)
b = s(w * dx * (v - ym[codes])) / sxx
a = ym - b * xm
res = v - a[codes] - b[codes] * i
chi2 = s(w * res * res)
n = np.bincount(codes, minlength=m)
scale = np.maximum(1.0, chi2 / (n - 2))
ub = np.sqrt(scale / sxx)
ua = np.sqrt(scale * (1 / sw + xm ** 2 / sxx))
k = 1.959963984540054
out = pd.DataFrame({"dut": names, "method": "wls", "n": n, "vth": a, "vth_u": ua,
                    "vth_ci_low": a - k * ua, "vth_ci_high": a + k * ua, "rth": -b, "rth_u": ub,
                    "rth_ci_low": -b - k * ub, "rth_ci_high": -b + k * ub, "flags": ""})
out.to_csv(dst, index=False, float_format="%.10g")
