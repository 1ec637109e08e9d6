"""The in-memory measurement object every part of the package reads clock comparisons from.

Readers (long and wide CSV) live in :mod:`ensemble.io.csvread`; this module only defines the
container and its invariants.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class Measurements:
    """Clock comparisons on a common epoch grid.

    Attributes
    ----------
    clocks : tuple of str, length n_clocks
        Clock identifiers (every clock and every reference that appears), in column order.
    mjd : ndarray, shape (n_epochs,)
        Epoch tags, Modified Julian Date in UTC, strictly increasing. [d]
    elapsed_s : ndarray, shape (n_epochs,)
        Time since the first epoch of the input file on a continuous scale (leap seconds counted), taken from the
        nominal sampling grid, never from float differences of ``mjd``. [s]
    phase_s : ndarray, shape (n_epochs, n_clocks)
        Time difference clock - reference at each epoch; NaN where missing; 0 in the column of
        that epoch's reference. [s]
    reference : ndarray of int, shape (n_epochs,)
        Column index (into ``clocks``) of each epoch's reference clock.
    tau0_s : float
        Nominal sampling interval found from the data. [s]
    source : str
        Path of the input file as given (for messages).
    sha256 : str
        SHA-256 of the input file's bytes (hex).
    """

    clocks: tuple[str, ...]
    mjd: np.ndarray
    elapsed_s: np.ndarray
    phase_s: np.ndarray
    reference: np.ndarray
    tau0_s: float
    source: str = ""
    sha256: str = ""

    @property
    def n_epochs(self) -> int:
        """Number of epochs (rows)."""
        return int(self.mjd.shape[0])

    @property
    def n_clocks(self) -> int:
        """Number of clocks (columns)."""
        return len(self.clocks)

    def column(self, name: str) -> int:
        """Column index of clock ``name`` (KeyError naming the known clocks if absent)."""
        try:
            return self.clocks.index(name)
        except ValueError:
            raise KeyError(f"unknown clock {name!r}; known: {', '.join(self.clocks)}") from None

    def difference(self, i: int | str, j: int | str) -> np.ndarray:
        """Measured difference clock i - clock j at every epoch [s], NaN where either is missing.

        Both are measured against the same reference at any one epoch, so
        (i - ref) - (j - ref) = i - j whatever the reference is.
        """
        i = self.column(i) if isinstance(i, str) else i
        j = self.column(j) if isinstance(j, str) else j
        return self.phase_s[:, i] - self.phase_s[:, j]

    def select(self, rows: slice | np.ndarray) -> "Measurements":
        """A new object holding only the given epochs (``elapsed_s`` keeps its origin)."""
        return Measurements(self.clocks, self.mjd[rows], self.elapsed_s[rows], self.phase_s[rows],
                            self.reference[rows], self.tau0_s, self.source, self.sha256)
