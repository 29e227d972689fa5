"""Where the real walks are: the vendored sample under ``tests/data/real``
(always there) and the full open data set in ``../shared/real_data`` beside
the repository (there on developer machines and in CI, not necessarily
elsewhere; tests that need it skip without it)."""

from pathlib import Path

import pytest

TESTS = Path(__file__).resolve().parent
VENDORED = TESTS / "data" / "real" / "siteA"


def _shared_site():
    for cand in (TESTS.parent.parent / "shared" / "real_data" / "siteA", Path("/work/shared/real_data/siteA")):
        if (cand / "F1" / "split.json").is_file():
            return cand
    return None


#: the full shared copy (None when absent)
FULL = _shared_site()


def real_dir(required="F1/split.json"):
    """The vendored sample if it holds ``required``, else the full copy, else None."""
    for cand in (VENDORED, FULL):
        if cand is not None and (cand / required).is_file():
            return cand
    return None


needs_full = pytest.mark.skipif(FULL is None, reason="full real-data copy (../shared/real_data) not available")
