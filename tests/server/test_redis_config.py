"""``serve --redis``: the shared log's configuration, from flags and the environment."""

from __future__ import annotations

import argparse

import pytest
from midstream import InputError
from midstream.client.cli import _cmd_serve
from midstream.server import ServerConfig, SharedLogConfig


def _config(*argv: str) -> ServerConfig:
    parser = argparse.ArgumentParser(prog="midstream")
    _cmd_serve.register(parser.add_subparsers())
    return _cmd_serve.build_config(parser.parse_args(["serve", "--port", "0", *argv]))


def test_no_redis_means_no_shared_log(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("MIDSTREAM_REDIS", raising=False)
    config = _config()
    assert config.shared_log is None and not config.reuse_port


def test_the_url_comes_from_the_flag_or_the_environment(
        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("MIDSTREAM_REDIS", "redis://10.1.2.3:6379/2")
    from_env = _config().shared_log
    assert from_env is not None and from_env.url == "redis://10.1.2.3:6379/2"
    flagged = _config("--redis", "redis://127.0.0.1:7000/0").shared_log
    assert flagged is not None and flagged.url == "redis://127.0.0.1:7000/0"


def test_log_limits_are_set_by_name_and_checked(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("MIDSTREAM_REDIS", raising=False)
    log = _config("--redis", "redis://h:1/0", "--redis-limit", "max_entries=100",
                  "--redis-limit", "max_age_s=60", "--redis-limit", "key_prefix=blue").shared_log
    assert log == SharedLogConfig(url="redis://h:1/0", max_entries=100, max_age_s=60.0,
                                  key_prefix="blue")
    with pytest.raises(InputError, match="NAME one of"):
        _config("--redis", "redis://h:1/0", "--redis-limit", "max_words=3")
    with pytest.raises(InputError, match="whole number"):
        _config("--redis", "redis://h:1/0", "--redis-limit", "max_entries=many")
    with pytest.raises(InputError, match="at least 1"):
        _config("--redis", "redis://h:1/0", "--redis-limit", "max_entries=0")
    with pytest.raises(InputError, match="needs --redis"):
        _config("--redis-limit", "max_entries=10")


@pytest.mark.parametrize("url", ["http://h:1/", "h:6379", ""])
def test_a_url_that_is_no_redis_url_is_refused(url: str) -> None:
    with pytest.raises(InputError, match="redis://"):
        SharedLogConfig(url=url)


def test_the_url_may_hold_a_password_so_the_repr_leaves_it_out() -> None:
    config = SharedLogConfig(url="redis://:s3cret@h:6379/0")
    assert "s3cret" not in repr(config)


@pytest.mark.parametrize(("url", "cluster", "client_url"), [
    ("redis+cluster://10.0.0.5:7000", True, "redis://10.0.0.5:7000"),
    ("rediss+cluster://:pw@10.0.0.5:7000", True, "rediss://:pw@10.0.0.5:7000"),
    ("redis://10.0.0.5:6379/0", False, "redis://10.0.0.5:6379/0"),
])
def test_a_cluster_url_asks_for_the_cluster_client(url: str, cluster: bool,
                                                   client_url: str) -> None:
    config = SharedLogConfig(url=url)
    assert (config.cluster, config.client_url) == (cluster, client_url)


def test_the_lease_and_the_orphan_grace_are_set_by_name_and_checked(
        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("MIDSTREAM_REDIS", raising=False)
    log = _config("--redis", "redis://h:1/0", "--redis-limit", "lease_s=5",
                  "--redis-limit", "orphan_grace_s=30").shared_log
    assert log is not None and (log.lease_s, log.orphan_grace_s) == (5.0, 30.0)
    defaults = SharedLogConfig(url="redis://h:1/0")
    assert (defaults.lease_s, defaults.orphan_grace_s) == (10.0, 120.0)  # docs/limits.md
    for bad in ("lease_s=0", "orphan_grace_s=-1", "orphan_grace_s=nan", "lease_s=inf"):
        with pytest.raises(InputError, match="finite number > 0"):
            _config("--redis", "redis://h:1/0", "--redis-limit", bad)
    with pytest.raises(InputError, match="takes a number"):
        _config("--redis", "redis://h:1/0", "--redis-limit", "orphan_grace_s=soon")
