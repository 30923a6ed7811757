"""Warm-up for scan workers.

Imported (for its side effect) by the server process that forks the workers of
``bondcheck scan``, before it forks any: one small check runs every lazy
import of the pipeline, so that each worker, and each replacement for a worker
stopped by ``--timeout``, starts ready instead of paying seconds of imports on
its first entry.  Nothing else imports this module.

Scans group sites by environment unless asked for symmetry, so the check runs
with ``Options(symmetry=False)``; the spglib path is warmed too when spglib is
loaded already (the scan has the server import it first for ``--symmetry``
scans), so that other scans' servers do not import spglib at all.
"""
from __future__ import annotations

import sys


def warm() -> None:
    import numpy as np

    from .api import Options, check_crystal
    from .read import read_cif_bytes
    from .record import Crystal

    cif = b"data_warm\n_cell_length_a 5.43\n_cell_length_b 5.43\n_cell_length_c 5.43\n" \
          b"loop_\n_atom_site_label\n_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\n" \
          b"Si1 0 0 0\nSi2 0.25 0.25 0.25\n"
    crystals = read_cif_bytes(cif, "warm")
    a = 2.7
    crystals.append(Crystal(
        cell=np.array([[0.0, a, a], [a, 0.0, a], [a, a, 0.0]]),
        frac=np.array([[0.0, 0.0, 0.0], [0.25, 0.25, 0.25]]),
        numbers=np.array([31, 33]), occupancy=np.ones(2), labels=np.array(["", ""]),
        charges=np.full(2, np.nan), name="warm", source="warm"))
    settings = [Options(symmetry=False)]
    if "spglib" in sys.modules:
        settings.append(Options(symmetry=True))
    for c in crystals:
        for options in settings:
            check_crystal(c, options)


try:
    warm()
except Exception:  # a failed warm-up only costs time later
    pass
