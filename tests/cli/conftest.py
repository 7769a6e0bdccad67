"""A live ``leastwise serve`` process (SQLite) shared by a module's CLI tests, and a CLI runner bound to it."""

from __future__ import annotations

import itertools
import json
from collections.abc import Callable, Iterator

import pytest
from click.testing import CliRunner, Result

from leastwise.cli import main
from tests.support.server import LeastwiseServer, module_server

_names = itertools.count(1)


@pytest.fixture(scope="module")
def live_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LeastwiseServer]:
    yield from module_server(tmp_path_factory, "cli-server")


@pytest.fixture
def cli(live_server: LeastwiseServer) -> Callable[..., Result]:
    """``cli("show", "ch-1")`` runs ``leastwise show ch-1 --url <live server>``; ``json=True`` adds ``-o json``."""

    def run(*args: str, json_out: bool = False, url: str | None = None, input: str | None = None) -> Result:
        argv = list(args) + ["--url", url or live_server.url] + (["--output", "json"] if json_out else [])
        return CliRunner().invoke(main, argv, input=input, env={"LEASTWISE_URL": None, "LEASTWISE_TOKEN": None,
                                                                   "LEASTWISE_OUTPUT": None})

    return run


@pytest.fixture
def name() -> str:
    return f"cli-{next(_names)}"


def out_json(result: Result):
    assert result.exit_code == 0, result.output
    return json.loads(result.stdout)
