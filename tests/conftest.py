import pathlib

import pytest

ROOT = pathlib.Path(__file__).resolve().parent.parent
SHARED = ROOT.parent / "shared"


@pytest.fixture
def nist_dir():
    """The NIST StRD reference files kept beside the project (absent in a user's clone)."""
    d = SHARED / "reference" / "nist"
    if not d.is_dir():
        pytest.skip(f"NIST reference folder {d} is absent (only the project workspace has it)")
    return d
