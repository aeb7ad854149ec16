"""CSV tables of tens of millions of rows, written in blocks by a compiled formatter.

Python's ``%`` formatting costs about a microsecond per row, which is over a minute for the
per-site table of a 10^8-ion run. Here every column of a block is first turned into integers
with numpy (fixed-point floats: ``rint(value * 10**decimals)``; text columns: codes into a small
list of labels), and a compiled loop writes the digits. Fixed-point values are rounded half
to even on the scaled binary value, which can differ from ``'%.4f'`` in the last digit only when
the value lies within rounding error of a half-way point.
"""

from __future__ import annotations

import numba
import numpy as np

from ..exceptions import InputError

__all__ = ['write_csv', 'format_block']

_NAN = np.iinfo(np.int64).min  # marks a non-finite value (written as nan / inf / -inf)


_POS_INF = _NAN + 1


_NEG_INF = _NAN + 2


ROWS_PER_BLOCK = 1 << 20


@numba.njit(cache=True, nogil=True, inline="always")  # per value: see decoding.rodchain on inlining
def _write_uint(buf, pos, v):
    if v == 0:
        buf[pos] = 48
        return pos + 1
    n = 0
    x = v
    while x > 0:
        n += 1
        x //= 10
    end = pos + n
    x = v
    for i in range(n):
        buf[end - 1 - i] = 48 + x % 10
        x //= 10
    return end


@numba.njit(cache=True, nogil=True)
def _format(values, decimals, labels, label_len, label_start, buf):
    """values: (n_cols, n) int64; decimals[c] >= 0 fixed point, -1 integer, -2 label code."""
    n_cols, n = values.shape
    pos = 0
    for i in range(n):
        for c in range(n_cols):
            if c:
                buf[pos] = 44  # ,
                pos += 1
            v = values[c, i]
            d = decimals[c]
            if d == -2:
                row = label_start[c] + v
                for b in range(label_len[row]):
                    buf[pos] = labels[row, b]
                    pos += 1
                continue
            if v == _NAN or v == _POS_INF or v == _NEG_INF:
                if v == _NEG_INF:
                    buf[pos] = 45
                    pos += 1
                word = (110, 97, 110) if v == _NAN else (105, 110, 102)
                for b in word:
                    buf[pos] = b
                    pos += 1
                continue
            if v < 0:
                buf[pos] = 45  # -
                pos += 1
                v = -v
            if d <= 0:
                pos = _write_uint(buf, pos, v)
                continue
            scale = 1
            for _ in range(d):
                scale *= 10
            pos = _write_uint(buf, pos, v // scale)
            buf[pos] = 46  # .
            pos += 1
            frac = v % scale
            for b in range(d - 1, -1, -1):
                buf[pos + b] = 48 + frac % 10
                frac //= 10
            pos += d
        buf[pos] = 10  # newline
        pos += 1
    return pos


def _decimals(fmt: str | None, arr: np.ndarray) -> int:
    if arr.dtype.kind in "iub":
        return -1
    if arr.dtype.kind in "OUS":
        return -2
    if fmt is None:
        return 6
    if not (fmt.startswith("%.") and fmt.endswith("f") and fmt[2:-1].isdigit()):
        raise InputError(f"table format {fmt!r} is not supported (use '%.<digits>f' for floats)")
    return int(fmt[2:-1])


def format_block(table: dict, columns, fmt: dict | None = None) -> bytes:
    """Rows of ``table`` (columns of equal length) as CSV text without a header.

    Parameters
    ----------
    table : dict of str -> (n,) array
        Integer, float or text columns.
    columns : sequence of str
        Column order.
    fmt : dict of str -> str, optional
        ``'%.<d>f'`` per float column (default 6 decimals).

    Returns
    -------
    bytes
    """
    fmt = fmt or {}
    cols = [np.asarray(table[c]) for c in columns]
    n = len(cols[0]) if cols else 0
    if any(len(c) != n for c in cols):
        raise InputError("table columns must have equal lengths")
    dec = np.array([_decimals(fmt.get(name), c) for name, c in zip(columns, cols)], dtype=np.int64)
    values = np.empty((len(cols), n), dtype=np.int64)
    labels, starts, width = [], [], 1
    for i, (c, d) in enumerate(zip(cols, dec)):
        starts.append(len(labels))
        if d == -2:
            import pandas as pd

            codes, uniq = pd.factorize(c, sort=False, use_na_sentinel=False)
            uniq = [str(u) for u in uniq]
            labels.extend(u.encode("utf-8") for u in uniq)
            values[i] = codes
            width += max((len(u.encode("utf-8")) for u in uniq), default=0) + 1
        elif d == -1:
            values[i] = c
            width += 21
        else:
            x = c.astype(np.float64) * 10.0 ** d
            v = np.rint(x)
            ok = np.isfinite(v) & (np.abs(v) < 9e18)
            values[i] = np.where(ok, v, 0).astype(np.int64)
            if not ok.all():
                values[i][np.isnan(x)] = _NAN
                values[i][np.isposinf(x) | (~ok & (x > 0) & ~np.isnan(x))] = _POS_INF
                values[i][np.isneginf(x) | (~ok & (x < 0) & ~np.isnan(x))] = _NEG_INF
            width += 21 + d
    lab = np.zeros((max(len(labels), 1), max((len(b) for b in labels), default=1)), dtype=np.uint8)
    lab_len = np.zeros(max(len(labels), 1), dtype=np.int64)
    for i, b in enumerate(labels):
        lab[i, :len(b)] = np.frombuffer(b, dtype=np.uint8)
        lab_len[i] = len(b)
    buf = np.empty(n * width + 1, dtype=np.uint8)
    end = _format(values, dec, lab, lab_len, np.asarray(starts, dtype=np.int64), buf)
    return buf[:end].tobytes()


def write_csv(path, blocks, columns, fmt: dict | None = None, comment: str | None = None):
    """Write a CSV file from an iterable of table blocks (dicts of equal-length columns).

    Parameters
    ----------
    path : str or Path
    blocks : iterable of dict
        Successive row blocks with the same columns.
    columns : sequence of str
        Header and column order.
    fmt : dict of str -> str, optional
        ``'%.<d>f'`` per float column.
    comment : str, optional
        One line written first as ``# comment``.
    """
    with open(path, "wb") as fh:
        if comment is not None:
            fh.write(f"# {comment}\n".encode("utf-8"))
        fh.write((",".join(columns) + "\n").encode("utf-8"))
        for block in blocks:
            n = len(np.asarray(block[columns[0]])) if columns else 0
            for s0 in range(0, n, ROWS_PER_BLOCK):
                part = {c: np.asarray(block[c])[s0:s0 + ROWS_PER_BLOCK] for c in columns}
                fh.write(format_block(part, columns, fmt))
