"""Shared fixtures: small tasting clubs (invented data, for internal tests only)."""
import pytest

from hybrid import HybridFactorModel
from hybrid.datasets.club import tasting_club


@pytest.fixture(scope="session")
def club():
    return tasting_club(n_members=600, n_lots=150, n_new=12, seed=11)


@pytest.fixture(scope="session")
def fitted(club):
    return HybridFactorModel(rank=4, epochs=15, schema=club.schema, holdout=0.1, seed=3,
                             text_min_df=1).fit(club.ratings, club.lots)


def pytest_terminal_summary(terminalreporter):
    # the fuzz suite's counts, printed even when output is captured (pytest -q in CI)
    import sys

    fuzz = sys.modules.get("test_fuzz")
    if fuzz is not None and fuzz.TALLY["tried"]:
        terminalreporter.write_line(f"fuzz: {fuzz.TALLY['tried']} cases tried, {fuzz.TALLY['passed']} passed")
