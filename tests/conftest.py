import sys
import warnings
from pathlib import Path

import pytest

HERE = Path(__file__).parent
ROOT = HERE.parent
sys.path.insert(0, str(HERE))

REFERENCE_DATA = ROOT.parent / "shared" / "reference_data"


@pytest.fixture
def reference_data():
    """Path of ../shared/reference_data; the test is skipped with a message when it is absent."""
    if not REFERENCE_DATA.is_dir():
        pytest.skip(f"open reference data not found at {REFERENCE_DATA} (a fresh clone has no ../shared)")
    return REFERENCE_DATA


@pytest.fixture
def demo_fields():
    return ROOT / "demo_fields"


@pytest.fixture
def quiet():
    """Silence FitCaution warnings inside a test that checks numbers, not cautions."""
    from tiltedring.errors import FitCaution

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FitCaution)
        yield
