"""Fixtures and report hooks for the engine tests.

``nist_table`` collects the NIST StRD log-relative-error table computed by
``test_nist.py``; :func:`pytest_terminal_summary` prints it at the end of the
run (visible without ``-s``).
"""

from __future__ import annotations

import pytest

NIST_TABLE = pytest.StashKey[dict]()


@pytest.fixture(scope="session")
def nist_table(request: pytest.FixtureRequest) -> dict:
    """Rows ``{dataset: {column: LRE}}`` shown in the terminal summary."""
    return request.config.stash.setdefault(NIST_TABLE, {})


def pytest_terminal_summary(terminalreporter, exitstatus, config) -> None:  # noqa: ARG001
    table = config.stash.get(NIST_TABLE, None)
    if not table:
        return
    columns = list(next(iter(table.values())).keys())
    terminalreporter.write_sep("-", "NIST StRD linear: LRE (min over coefficients / standard deviations)")
    terminalreporter.write_line(f"{'dataset':<10}" + "".join(f"{c:>13}" for c in columns))
    for name, row in table.items():
        terminalreporter.write_line(f"{name:<10}" + "".join(f"{row.get(c, float('nan')):>13.2f}" for c in columns))
