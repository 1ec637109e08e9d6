"""Fast writer of the long measurement CSV (internal module of :mod:`ensemble.simulate`).

Layout (docs/input.md): header ``mjd,clock,reference,phase``; one row per existing
measurement; rows sorted by epoch, then by clock identifier (string order); missing values are
absent rows.

* ``mjd`` with 10 decimals (1e-10 d = 8.6 us): every tag sits on the nominal grid to far better
  than any sampling interval, and a reader rounding intervals to the grid recovers it exactly.
* ``phase`` as the shortest decimal string that reads back to the identical float64 (numpy's
  float-to-text conversion, Dragon4 "unique" mode): lossless by construction, 17 significant
  digits at most, and no longer than needed.

The text is assembled without a Python loop over rows: each field becomes a fixed-width byte
matrix (NUL-padded), the fields are concatenated column-wise and the NUL padding removed.
Written through :func:`ensemble.atomic.atomic_output`.
"""

from __future__ import annotations

import contextlib

import numpy as np

from ..atomic import atomic_output

HEADER = b"mjd,clock,reference,phase\n"
#: Rows assembled per block (bounds the memory of the byte matrices).
BLOCK_ROWS = 262144


def _byte_matrix(strings: np.ndarray) -> np.ndarray:
    """(n,) bytes array -> (n, width) uint8 matrix, NUL-padded."""
    strings = np.ascontiguousarray(strings)
    width = strings.dtype.itemsize
    return strings.view(np.uint8).reshape(strings.shape[0], width)


def format_mjd(mjd: np.ndarray) -> np.ndarray:
    """Epoch tags as fixed 10-decimal text (one conversion per epoch, not per row)."""
    return np.array([b"%.10f" % v for v in np.asarray(mjd, dtype=float).tolist()])


def long_csv_bytes(mjd: np.ndarray, clocks, phase_s: np.ndarray, reference: np.ndarray,
                   rows: slice = slice(None)) -> bytes:
    """The CSV body (no header) for the epochs ``rows``.

    Parameters
    ----------
    mjd : ndarray, shape (T,)
        Epoch tags. [d]
    clocks : sequence of str, length N
        Column identifiers.
    phase_s : ndarray, shape (T, N)
        Clock - reference, NaN where missing. [s]
    reference : ndarray of int, shape (T,)
        Column of each epoch's reference.
    rows : slice
        Epochs to format.

    Returns
    -------
    bytes
    """
    names = np.array([c.encode("ascii") for c in clocks])
    order = np.argsort(np.array(list(clocks)), kind="stable")
    block = np.asarray(phase_s)[rows][:, order]
    ti, cj = np.nonzero(~np.isnan(block))
    if ti.size == 0:
        return b""
    n = ti.size
    values = block[ti, cj].astype("S32")
    mjd_text = _byte_matrix(format_mjd(np.asarray(mjd)[rows]))
    name_m = _byte_matrix(names)
    ref = np.asarray(reference)[rows]
    comma = np.full((n, 1), ord(","), dtype=np.uint8)
    newline = np.full((n, 1), ord("\n"), dtype=np.uint8)
    matrix = np.concatenate([mjd_text[ti], comma, name_m[order[cj]], comma, name_m[ref[ti]],
                             comma, _byte_matrix(values), newline], axis=1)
    flat = matrix.ravel()
    return flat[flat != 0].tobytes()


def write_long_csv(path, mjd: np.ndarray, clocks, phase_s: np.ndarray,
                   reference: np.ndarray, atomic: bool = True) -> int:
    """Write the long-form measurement CSV.

    Parameters
    ----------
    path : path-like
        Output file.
    mjd, clocks, phase_s, reference
        As for :func:`long_csv_bytes`.
    atomic : bool
        Write to a temporary file renamed over ``path`` when complete (default).  False writes
        ``path`` directly, for callers that manage the atomic replacement themselves.

    Returns
    -------
    int
        Number of data rows written.
    """
    phase_s = np.asarray(phase_s)
    step = max(1, BLOCK_ROWS // max(1, phase_s.shape[1]))
    with (atomic_output(path) if atomic else contextlib.nullcontext(path)) as target:
        with open(target, "wb") as fh:
            fh.write(HEADER)
            for start in range(0, phase_s.shape[0], step):
                fh.write(long_csv_bytes(mjd, clocks, phase_s, reference,
                                        slice(start, start + step)))
    return int(np.count_nonzero(~np.isnan(phase_s)))
