import sys
from pathlib import Path

import pytest

TESTS = Path(__file__).parent
ROOT = TESTS.parent
sys.path.insert(0, str(TESTS))

REFERENCE_PHASES = ROOT / "reference_phases"


@pytest.fixture(scope="session")
def reference_library(tmp_path_factory):
    """The shipped reference_phases/ built once per test session."""
    from ringid.library import build_library

    out = tmp_path_factory.mktemp("library")
    build_library(REFERENCE_PHASES, out)
    return out
