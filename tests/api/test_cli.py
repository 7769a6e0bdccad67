"""The command line: serve refuses non-loopback addresses; settings from the environment."""

from __future__ import annotations

import pytest
from click.testing import CliRunner

from leastwise.cli import main
from leastwise.serve import is_loopback
from leastwise.settings import Settings


@pytest.mark.parametrize("host", ["0.0.0.0", "192.168.1.10", "::", "example.invalid"])
def test_serve_refuses_non_loopback(host):
    result = CliRunner().invoke(main, ["serve", "--host", host, "--port", "8622"])
    assert result.exit_code != 0
    assert "loopback" in result.output


def test_loopback_names():
    assert is_loopback("127.0.0.1") and is_loopback("::1") and is_loopback("localhost") and is_loopback("127.0.0.2")


def test_settings_from_env():
    s = Settings.from_env({"LEASTWISE_PORT": "9000", "LEASTWISE_CHECKPOINT_EVERY": "5", "LEASTWISE_COMPACT_LOG": "yes"},
                          database="sqlite:///x.db")
    assert (s.port, s.checkpoint_every, s.compact_log, s.database) == (9000, 5, True, "sqlite:///x.db")
    with pytest.raises(ValueError):
        Settings.from_env({"LEASTWISE_PORT": "abc"})


def test_group_gather_setting_reaches_the_writer(tmp_path):
    from leastwise.api.app import build_registry

    url = f"sqlite:///{tmp_path / 'g.sqlite3'}"
    s = Settings.from_env({"LEASTWISE_GROUP_GATHER_US": "0", "LEASTWISE_DATABASE": url})
    assert s.group_gather_us == 0
    registry = build_registry(s)
    try:
        assert registry._group_writer().gather_wait == 0.0  # gathering off
    finally:
        registry.close()
    default = build_registry(Settings(database=url))
    assert default.group_gather == 0.0005  # the default, 500 us
    default.close()
    for bad in ("-1", "100001"):
        with pytest.raises(ValueError, match="group_gather_us"):
            Settings.from_env({"LEASTWISE_GROUP_GATHER_US": bad})


def test_demo_still_works():
    result = CliRunner().invoke(main, ["demo", "--readings", "200"])
    assert result.exit_code == 0, result.output


def test_serve_keeps_blas_to_one_thread():
    # The limit as threadpoolctl itself reports it for every BLAS library numpy and scipy loaded.
    from threadpoolctl import threadpool_info, threadpool_limits

    from leastwise.serve import single_threaded_blas

    import numpy  # noqa: F401 - loads the BLAS library
    import scipy.linalg  # noqa: F401

    with threadpool_limits(limits=None):  # restored afterwards: other tests keep their BLAS threads
        single_threaded_blas()
        blas = [pool for pool in threadpool_info() if pool["user_api"] == "blas"]
        assert blas and all(pool["num_threads"] == 1 for pool in blas)
