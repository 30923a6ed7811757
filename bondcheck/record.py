"""The light crystal record passed between pipeline stages.

Plain data only: numpy arrays and strings, no pymatgen or ase objects, so the
record is cheap to build, pickle and ship to worker processes.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


class StructureError(ValueError):
    """An input that cannot be checked. The message is one line, meant for users."""


@dataclass(slots=True)
class Crystal:
    """One crystal structure as read from a file or converted from an object.

    cell:      (3, 3) float64, rows are the lattice vectors a, b, c in angstrom.
    frac:      (n, 3) float64 fractional coordinates, wrapped into [0, 1).
    numbers:   (n,) int64 atomic numbers (deuterium and tritium are 1).
    occupancy: (n,) float64, site occupancy of each entry in (0, 1].
               Disordered sites appear as several entries at the same position.
    labels:    (n,) str, the site label from the file ('' when the format has none).
    charges:   (n,) float64, formal charge from a type symbol such as 'Sb3-',
               nan when not given.
    name:      block name or file stem.
    source:    where it came from (path, with '#block' when a file holds several).
    """

    cell: np.ndarray
    frac: np.ndarray
    numbers: np.ndarray
    occupancy: np.ndarray
    labels: np.ndarray
    charges: np.ndarray
    name: str = ""
    source: str = ""
    meta: dict = field(default_factory=dict)

    @property
    def natoms(self) -> int:
        return len(self.numbers)

    @property
    def volume(self) -> float:
        return float(abs(np.linalg.det(self.cell)))

    @property
    def cartesian(self) -> np.ndarray:
        return self.frac @ self.cell

    def label(self, k: int) -> str:
        """Site label of atom k, or element symbol and 1-based index when the
        file gave none."""
        labels = self.labels
        lab = str(labels.item(k)) if len(labels) else ""  # item(): no numpy scalar on the way
        if lab:
            return lab
        from .elements import symbols

        return f"{symbols()[int(self.numbers[k])]}{k + 1}"
