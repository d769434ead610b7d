"""Command-line conventions people expect: --version, python -m, -v anywhere, environment."""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
from importlib import metadata
from pathlib import Path

import pytest
from client_kit import free_port
from midstream import InputError
from midstream.client.cli import _cmd_serve
from midstream.client.cli._main import build_parser, main, verbosity


def test_version_prints_the_installed_distribution_version(
        capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["--version"])
    assert exit_info.value.code == 0
    assert capsys.readouterr().out.strip() == f"midstream {metadata.version('midstream')}"


def test_python_dash_m_midstream_runs_the_command_line() -> None:
    done = subprocess.run([sys.executable, "-m", "midstream", "--version"],
                          capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("midstream ")
    done = subprocess.run([sys.executable, "-m", "midstream", "no-such-command"],
                          capture_output=True, text=True, timeout=120, check=False)
    assert done.returncode == 2
    assert "invalid choice" in done.stderr


@pytest.mark.parametrize(("argv", "expected"), [
    (["serve"], 0),
    (["-v", "serve"], 1),
    (["serve", "-v"], 1),
    (["-v", "serve", "-vv"], 3),
    (["corpus", "stats", "somewhere", "--verbose"], 1),
    (["train", "words", "somewhere", "-v"], 1),
])
def test_verbose_is_accepted_before_and_after_the_command(argv: list[str], expected: int) -> None:
    assert verbosity(build_parser().parse_args(argv)) == expected


def test_version_is_accepted_after_the_command(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exit_info:
        main(["evaluate", "--version"])
    assert exit_info.value.code == 0
    assert capsys.readouterr().out.startswith("midstream ")


def _serve_args(*argv: str) -> argparse.Namespace:
    return build_parser().parse_args(["serve", *argv])


def test_serve_reads_host_port_and_models_from_the_environment(tmp_path: Path) -> None:
    environ = {"MIDSTREAM_HOST": "0.0.0.0", "MIDSTREAM_PORT": "6123",
               "MIDSTREAM_MODELS": str(tmp_path)}
    config = _cmd_serve.build_config(_serve_args(), environ=environ)
    assert (config.host, config.port, config.models_dir) == ("0.0.0.0", 6123, tmp_path)
    # An option on the command line wins over its variable.
    config = _cmd_serve.build_config(
        _serve_args("--host", "127.0.0.2", "--port", "0", "--models", "elsewhere"),
        environ=environ)
    assert (config.host, config.port, config.models_dir) == ("127.0.0.2", 0, Path("elsewhere"))
    # Neither: the documented defaults.
    config = _cmd_serve.build_config(_serve_args(), environ={})
    assert (config.host, config.port, config.models_dir) == ("127.0.0.1", 50051, None)


@pytest.mark.parametrize("value", ["abc", "-1", "70000", "50 051"])
def test_a_bad_port_variable_is_named_in_the_error(value: str) -> None:
    with pytest.raises(InputError, match=r"MIDSTREAM_PORT: .* is not a port number"):
        _cmd_serve.build_config(_serve_args(), environ={"MIDSTREAM_PORT": value})


def test_serve_help_documents_the_environment_variables(
        capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["serve", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    for name in ("MIDSTREAM_HOST", "MIDSTREAM_PORT", "MIDSTREAM_MODELS"):
        assert name in text
    assert "the option wins" in text


def test_subscribe_to_a_server_that_is_not_there_says_it_cannot_connect(
        capsys: pytest.CaptureFixture[str]) -> None:
    target = f"127.0.0.1:{free_port()}"
    assert main(["subscribe", "call-7", "--server", target]) == 3
    captured = capsys.readouterr()
    assert "reconnect" not in captured.out + captured.err
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"midstream: server {target}: ")
    assert "cannot reach the server" in lines[0]


def test_a_reader_that_stops_early_ends_the_command_quietly(tmp_path: Path) -> None:
    # `midstream corpus stats ... | head`: the pipe's reader leaves before the command writes.
    transcript = tmp_path / "call.inline"
    transcript.write_text("@format midstream-inline 1\n@conversation c1\n"
                          "A statement: {F uh} we [ go + go ] now /\n", encoding="utf-8")
    read_end, write_end = os.pipe()
    os.close(read_end)
    try:
        done = subprocess.run([sys.executable, "-m", "midstream", "corpus", "stats",
                               str(transcript)], stdout=write_end, stderr=subprocess.PIPE,
                              text=True, timeout=120, check=False)
    finally:
        os.close(write_end)
    assert done.returncode == 141
    assert "Traceback" not in done.stderr
    assert "BrokenPipeError" not in done.stderr
