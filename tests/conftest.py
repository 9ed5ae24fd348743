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
    from ringid.library.store import build_library

    out = tmp_path_factory.mktemp("library")
    build_library(REFERENCE_PHASES, out)
    return out


def without_timings(obj):
    """A JSON record with every ``timings_s`` key removed (the only fields allowed to differ
    between two runs of the same inputs)."""
    if isinstance(obj, dict):
        return {k: without_timings(v) for k, v in obj.items() if k != "timings_s"}
    if isinstance(obj, list):
        return [without_timings(v) for v in obj]
    return obj


def write_sheet(path, rows, fieldnames=None) -> None:
    """Write sheet rows (dicts) as CSV with a header."""
    import csv

    rows = list(rows)
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=fieldnames or list(rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
