"""Columns → CSV bytes without a Python call per cell.

``table_csv`` in :mod:`sagfit.io_csv` writes 100,000 DUTs × 23 columns; formatting 2.3
million floats one by one with ``'%.10g' %`` costs about 0.2 µs each, more than the fit.
Here every column becomes a ``(rows, width)`` byte matrix padded with 0xFF (a byte that
never occurs in UTF-8), the matrices and the separators are laid side by side, and one
boolean mask drops the padding.

Floats come out exactly as Python's ``'%.10g' % x`` writes them (the property test in
``tests/test_numtext.py`` holds every path to that reference): the 10-digit mantissa is
found with one correctly rounded multiplication or division by an exact power of ten;
the few values whose scaled mantissa lies within a few units in the last place of a
rounding tie, whose exponent estimate was off, or that lie outside 1e-280…1e280 are
handed to Python's own formatter. Non-finite values become empty cells.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

PAD = 0xFF  # never a byte of UTF-8 text
WIDTH = 17  # len('%.10g' % -1.234567891e-308)
CHUNK_ROWS = 65_536  # rows formatted at a time: bounds the temporaries (a few MB)
_TIE = 8e-6  # four ulps of a mantissa below 1e10 (ulp 2**-19 ≈ 1.9e-6)

# Byte columns of the per-row source table built in _g10_chunk: 0–9 the ten mantissa
# digits, then '.', the sign ('-' or PAD), '0', 'e', the exponent's sign, its hundreds
# digit (PAD below 100), tens and units digits, and PAD.
_S_DOT, _S_SIGN, _S_ZERO, _S_E, _S_ESIGN, _S_EXP, _S_PAD = 10, 11, 12, 13, 14, 15, 18
_FORMS = 15  # 0–13: fixed notation with exponent −4…9; 14: exponent notation


@lru_cache(maxsize=1)
def _patterns() -> np.ndarray:
    """Source columns of each output byte, one row per form, all ten digits present
    (trailing zeros and a bare '.' are turned into PAD in the source beforehand)."""
    table = np.full((_FORMS, WIDTH), _S_PAD, dtype=np.intp)
    for form in range(_FORMS):
        idx = [_S_SIGN]
        if form < 14:
            x = form - 4
            if x >= 0:
                idx += list(range(x + 1)) + [_S_DOT] + list(range(x + 1, 10))
            else:
                idx += [_S_ZERO, _S_DOT] + [_S_ZERO] * (-x - 1) + list(range(10))
        else:
            idx += [0, _S_DOT] + list(range(1, 10)) + [_S_E, _S_ESIGN, _S_EXP, _S_EXP + 1,
                                                       _S_EXP + 2]
        table[form, :len(idx)] = idx  # at most 17 bytes (see WIDTH)
    return table


@lru_cache(maxsize=1)
def _digit_masks():
    """For keep = 0…9: OR masks of the source words 0, 1 and 2 (digits 0–3, 4–7, 8–9)
    that turn the digits after digit ``keep`` into PAD."""
    masks = np.zeros((3, 10), dtype="<u4")
    for keep in range(10):
        for digit in range(keep + 1, 10):
            masks[digit // 4, keep] |= PAD << (8 * (digit % 4))
    return masks[0], masks[1], masks[2]


@lru_cache(maxsize=1)
def _tables():
    """Lookup tables as little-endian words: the digit characters of 0–9999 (4 bytes) and
    of 0–99 (2 bytes), the exponent words (bytes 12–19 of the source row) for exponents
    −400…400, trailing-zero counts of 4- and 2-digit groups, and the powers 1e0…1e308."""
    def chars(width):
        v = np.arange(10 ** width)
        return np.stack([v // 10 ** (width - 1 - j) % 10 for j in range(width)],
                        axis=1).astype(np.uint8) + ord("0")

    def trailing(width):
        v = np.arange(10 ** width)
        tz = np.zeros(v.size, dtype=np.intp)
        for j in range(1, width + 1):
            tz += v % 10 ** j == 0
        return tz

    ex = np.arange(-400, 401)
    ea = np.abs(ex)
    exp_bytes = np.stack([np.full(ex.size, ord("0")), np.full(ex.size, ord("e")),
                          np.where(ex < 0, ord("-"), ord("+")),
                          np.where(ea >= 100, ea // 100 % 10 + ord("0"), PAD),
                          ea // 10 % 10 + ord("0"), ea % 10 + ord("0"),
                          np.full(ex.size, PAD), np.full(ex.size, PAD)], axis=1)
    exp_words = np.ascontiguousarray(exp_bytes.astype(np.uint8)).view("<u4")  # (801, 2)
    return (chars(4).view("<u4").reshape(-1), chars(2).view("<u2").reshape(-1).astype("<u4"),
            exp_words[:, 0].copy(), exp_words[:, 1].copy(), trailing(4), trailing(2),
            np.array([10.0 ** k for k in range(309)]))


def g10_matrix(x: np.ndarray) -> np.ndarray:
    """``'%.10g' % v`` of each value as a ``(n, WIDTH)`` uint8 matrix padded with PAD;
    NaN and ±inf give an empty (all-PAD) row."""
    x = np.asarray(x, dtype=np.float64).reshape(-1)
    out = np.empty((x.size, WIDTH), dtype=np.uint8)
    for start in range(0, x.size, CHUNK_ROWS):
        out[start:start + CHUNK_ROWS] = _g10_chunk(x[start:start + CHUNK_ROWS])
    return trim(out)


def _g10_chunk(x: np.ndarray) -> np.ndarray:
    n = x.size
    t4, t2, exp_lo, exp_hi, tz4, tz2, pow10 = _tables()
    finite = np.isfinite(x)
    zero = x == 0.0
    a = np.abs(x)
    a[~finite | zero] = 1.0
    e = np.floor(np.log10(a)).astype(np.intp)
    odd = (e < -280) | (e > 280)
    e[odd] = 0
    p = 9 - e  # scale by 10**p: one correctly rounded operation (exact powers to 1e22)
    with np.errstate(over="ignore", invalid="ignore"):  # the odd rows are redone below
        s = np.where(p >= 0, a * pow10[np.maximum(p, 0)], a / pow10[np.maximum(-p, 0)])
        odd |= ~(np.abs(s - np.floor(s) - 0.5) >= _TIE)
        s[odd] = 1e9
    m = np.rint(s).astype(np.int64)
    carry = m == 10_000_000_000  # 9.9999999996 → 10: one more exponent, mantissa 1e9
    m[carry] = 1_000_000_000
    e[carry] += 1
    odd |= (m < 1_000_000_000) | (m > 9_999_999_999)
    odd &= finite & ~zero
    m[odd] = 1_000_000_000
    m[zero] = 0
    e[zero] = 0

    g0 = m // 1_000_000
    rest = m - g0 * 1_000_000
    g1 = rest // 100
    g2 = rest - g1 * 100
    last = np.maximum(9 - (tz2[g2] + (g2 == 0) * (tz4[g1] + (g1 == 0) * tz4[g0])), 0)
    fixed = (e >= -4) & (e < 10)
    # trailing zeros of the mantissa, and a '.' with nothing after it, become padding:
    # digit k is kept for k ≤ keep; OR-ing a word with a mask of 0xFF bytes pads the rest
    keep = np.where(fixed & (e >= 0), np.maximum(last, e), last)
    bare_dot = np.where(fixed, (e >= 0) & (keep <= e), keep == 0)
    w0, w1, w2 = _digit_masks()
    sign = np.where(np.signbit(x), ord("-"), PAD).astype("<u4")
    src = np.empty((n, 5), dtype="<u4")
    src[:, 0] = t4[g0] | w0[keep]
    src[:, 1] = t4[g1] | w1[keep]
    src[:, 2] = (t2[g2] | w2[keep] | (ord(".") << 16) | (sign << 24)
                 | (bare_dot.astype("<u4") * np.uint32(PAD << 16)))
    src[:, 3] = exp_lo[e + 400]
    src[:, 4] = exp_hi[e + 400]
    src = src.view(np.uint8)  # (n, 20)

    form = np.where(fixed, e + 4, 14)
    pats = _patterns()
    counts = np.bincount(form, minlength=_FORMS)
    top = int(np.argmax(counts))
    out = src[:, pats[top]]  # every row in the commonest form, then the others redone
    if counts[top] < n:
        for f in np.flatnonzero(counts):
            if f != top:
                rows = np.flatnonzero(form == f)
                out[rows] = src[rows][:, pats[f]]
    if not finite.all():
        out[~finite] = PAD
    for i in np.flatnonzero(odd):  # rare: Python's own formatter, exact by definition
        text = b"%.10g" % x[i]
        out[i] = PAD
        out[i, :len(text)] = np.frombuffer(text, dtype=np.uint8)
    return out


def small_set_matrix(values: np.ndarray, fmt) -> np.ndarray:
    """Format a column with few distinct values (counts, flag codes): each distinct value
    once, with ``fmt``, then gathered row by row."""
    uniq, inverse = np.unique(values, return_inverse=True)
    return text_matrix([fmt(u) for u in uniq.tolist()])[inverse.reshape(-1)]


def text_matrix(vals: list[str]) -> np.ndarray:
    """UTF-8 text cells → ``(n, width)`` uint8 matrix padded with PAD."""
    n = len(vals)
    if n == 0:
        return np.empty((0, 0), dtype=np.uint8)
    joined = "".join(vals)
    if joined.isascii() and "\x00" not in joined:  # numpy drops trailing NULs
        arr = np.array(vals, dtype=np.str_)  # C-level copy into fixed-width UCS-4
        width = arr.dtype.itemsize // 4
        if width == 0:
            return np.full((n, 1), PAD, dtype=np.uint8)
        mat = arr.view(np.uint32).reshape(n, width).astype(np.uint8)
        lens = np.fromiter(map(len, vals), dtype=np.intp, count=n)
    else:
        enc = [v.encode("utf-8") for v in vals]
        lens = np.fromiter(map(len, enc), dtype=np.intp, count=n)
        width = max(int(lens.max()), 1)
        mat = np.zeros((n, width), dtype=np.uint8)
        flat = np.frombuffer(b"".join(enc), dtype=np.uint8)
        rows = np.repeat(np.arange(n), lens)
        cols = np.arange(flat.size) - np.repeat(np.cumsum(lens) - lens, lens)
        mat[rows, cols] = flat
    mat[np.arange(width)[None, :] >= lens[:, None]] = PAD
    return mat


def trim(block: np.ndarray) -> np.ndarray:
    """Drop the all-padding columns at the right of a cell matrix (fewer bytes to join)."""
    used = np.flatnonzero((block != PAD).any(axis=0))
    return block[:, :used[-1] + 1] if used.size else block[:, :0]


def join_rows(blocks: list[np.ndarray]) -> memoryview:
    """Side-by-side cell matrices → CSV body bytes: cells joined by ',' and rows ended
    by '\\n', padding dropped.

    Works through the rows in slices of about 4 MB laid into one reused buffer, and packs
    the bytes into one output array (fresh memory costs page faults: on 100,000 DUTs the
    naive concatenate-and-mask took three times as long).
    """
    n = blocks[0].shape[0]
    width = sum(b.shape[1] for b in blocks) + len(blocks)
    step = max(1, min(n, (4 << 20) // width))
    buf = np.empty((step, width), dtype=np.uint8)
    spans = []
    col = 0
    for b in blocks:
        spans.append((col, col + b.shape[1]))
        col += b.shape[1]
        buf[:, col] = ord(",")
        col += 1
    buf[:, width - 1] = ord("\n")
    out = np.empty(n * width, dtype=np.uint8)  # pages past the packed text stay untouched
    pos = 0
    for start in range(0, n, step):
        rows = min(step, n - start)
        for b, (c0, c1) in zip(blocks, spans):
            if c1 > c0:
                buf[:rows, c0:c1] = b[start:start + rows]
        flat = buf[:rows].reshape(-1)
        packed = flat[flat != PAD]
        out[pos:pos + packed.size] = packed
        pos += packed.size
    return memoryview(out[:pos])
