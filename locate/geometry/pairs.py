"""Mic pairs: the incidence matrix that turns per-mic quantities into pair differences.

A pair ``(i, j)`` measures ``t_j - t_i`` (the package's delay sign: positive when the sound
reaches mic j later).  Its row of the incidence matrix is ``+1`` at ``j`` and ``-1`` at ``i``, so
``A @ t`` is the vector of pair differences of per-mic times ``t``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["incidence_matrix"]


def incidence_matrix(pairs, n_columns, column_of=None):
    """Pair incidence matrix, shape (P, n_columns).

    Parameters
    ----------
    pairs : array_like of int, shape (P, 2)
        Mic indices ``(i, j)`` of each pair.
    n_columns : int
        Number of columns (mics, or the unknowns they map to).
    column_of : array_like of int, optional
        Column of each mic (default: the mic's own index).  Two mics that map to one column
        (e.g. one recorder's clock) cancel in a pair between them.

    Returns
    -------
    numpy.ndarray
        ``+1`` at ``column_of[j]`` and ``-1`` at ``column_of[i]`` in each pair's row.
    """
    pairs = np.asarray(pairs, dtype=int).reshape(-1, 2)
    cols = np.arange(int(n_columns)) if column_of is None else np.asarray(column_of, int)
    a = np.zeros((len(pairs), int(n_columns)))
    rows = np.arange(len(pairs))
    np.add.at(a, (rows, cols[pairs[:, 1]]), 1.0)
    np.add.at(a, (rows, cols[pairs[:, 0]]), -1.0)
    return a
