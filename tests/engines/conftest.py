"""Fixtures shared by the engine tests: the demo table and a DuckDB relation over it."""

import pytest

import stratagem as sg


@pytest.fixture(scope="module")
def demo():
    """The invented home-visit programme (``stratagem.demo_data()``), read only by the tests."""
    return sg.demo_data()


@pytest.fixture(scope="module")
def rel(demo):
    """The demo table as a relation of a new in-memory DuckDB connection."""
    duckdb = pytest.importorskip("duckdb")
    return duckdb.connect().from_df(demo)
