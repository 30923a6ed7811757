import os
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
CORPUS = ROOT / ".." / "shared" / "corpus"


def _ase_dir():
    import ase

    return Path(os.path.dirname(ase.__file__))


def _pmg_dir():
    import pymatgen.util

    return Path(os.path.dirname(pymatgen.util.__file__))


MINERALS = _ase_dir() / "test" / "testdata" / "minerals"
PMG_STRUCTURES = _pmg_dir() / "structures"


@pytest.fixture(scope="session")
def minerals() -> Path:
    return MINERALS


@pytest.fixture(scope="session")
def pmg_structures() -> Path:
    return PMG_STRUCTURES


@pytest.fixture(scope="session")
def corpus() -> Path:
    if not CORPUS.is_dir():
        pytest.skip("../shared/corpus is absent")
    return CORPUS


def site(result, label=None, element=None):
    """The first site row of a result matching label and/or element."""
    for s in result.sites:
        if (label is None or s["label"] == label) and (element is None or s["element"] == element):
            return s
    raise KeyError((label, element))
