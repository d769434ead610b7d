"""Smoke tests of the load generator, ``midstream bench`` and its benchmark subcommands.

They run for seconds against real servers with real models and check that the output is
well formed (every key present, every number finite) and that the run did what it says (every
word sent got a hypothesis, no errors); they never assert on timings.
"""

from __future__ import annotations

import asyncio
import doctest
import json
import math
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from client_kit import Served, models_dir, served
from midstream import InputError
from midstream.client.bench import _kit
from midstream.client.bench._load import (
    MAX_FRAME_EVENTS,
    LoadConfig,
    ProcessProbe,
    WordScript,
    _distribution,
    _frames,
    parse_steal,
    read_steal,
    run_load,
)
from midstream.client.bench._scale_out import BEGIN, END, Sweep, step_passed, write_section
from midstream.client.cli._cmd_bench import load_script, serve_command
from midstream.client.cli._cmd_serve import build_config
from midstream.client.cli._main import _command_parsers, build_parser, main
from midstream.server import ServerLimits
from midstream.wire import midstream_pb2 as pb
from redis_kit import RedisProcess, redis_server_fixture

__all__ = ["models_dir", "redis_server_fixture", "served"]  # fixtures used here, for pytest

_LOAD_KEYS = {
    "target", "workload", "conversations", "rate_per_conversation", "offered_wps", "seconds",
    "channels", "opened", "words_sent", "words_answered", "answered_in_window", "measured_s",
    "achieved_wps", "latency_ms", "send_lag_ms", "errors", "error_count",
    "client_cpu_percent", "server", "steal", "server_loop_lag", "corpus",
}
_DISTRIBUTION_KEYS = {"p50", "p95", "p99", "max", "mean"}
_SERVER_KEYS = {"cpu_percent", "rss_before_bytes", "rss_open_bytes", "rss_after_bytes",
                "bytes_per_open_conversation", "bytes_per_conversation_after"}


def _finite_numbers(value: Any) -> list[float]:
    """Every number inside a JSON value."""
    if isinstance(value, bool):
        return []
    if isinstance(value, int | float):
        return [float(value)]
    if isinstance(value, dict):
        return [n for v in value.values() for n in _finite_numbers(v)]
    if isinstance(value, list):
        return [n for v in value for n in _finite_numbers(v)]
    return []


def _check_load(summary: dict[str, Any], *, local: bool) -> None:
    assert summary.keys() >= _LOAD_KEYS
    assert summary["latency_ms"].keys() == _DISTRIBUTION_KEYS
    assert all(math.isfinite(n) for n in _finite_numbers(summary))
    assert summary["opened"] == summary["conversations"]
    assert summary["error_count"] == 0, summary["errors"]
    assert summary["words_sent"] > 0
    # Every word sent gets a hypothesis naming it (the Feed contract in midstream.proto).
    assert summary["words_answered"] == summary["words_sent"]
    assert summary["latency_ms"]["p50"] <= summary["latency_ms"]["p99"] \
        <= summary["latency_ms"]["max"]
    steal = summary["steal"]
    if steal is not None:  # a Linux host: one figure per CPU, none negative
        assert len(steal["per_cpu_ms"]) == os.cpu_count()
        assert min(steal["per_cpu_ms"]) >= 0 and steal["max_percent"] >= 0
    if local:
        assert summary["server"].keys() == _SERVER_KEYS
        assert summary["server"]["rss_before_bytes"] > 0
    else:
        assert summary["server"] is None


def _bench(argv: list[str], capsys: pytest.CaptureFixture[str]) -> dict[str, Any]:
    assert main(["bench", "--smoke", "--json", *argv]) == 0
    out: dict[str, Any] = json.loads(capsys.readouterr().out)
    return out


@pytest.mark.corpus
def test_bench_against_a_running_server(served: Served, swda_dir: Path,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    summary = _bench(["--target", served.target, "--corpus", str(swda_dir)], capsys)
    _check_load(summary, local=False)
    assert summary["workload"] == "feed"
    assert summary["conversations"] == 4


@pytest.mark.corpus
def test_bench_baseline_and_server_pid(served: Served, swda_dir: Path,
                                       capsys: pytest.CaptureFixture[str]) -> None:
    # The served fixture runs in this process, so its pid is ours.
    summary = _bench(["--target", served.target, "--corpus", str(swda_dir), "--baseline",
                      "--server-pid", str(os.getpid())], capsys)
    _check_load(summary, local=True)
    assert summary["workload"] == "describe"


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_spawns_its_own_server(models_dir: Path, swda_dir: Path,
                                     capsys: pytest.CaptureFixture[str]) -> None:
    summary = _bench(["--spawn", "--models", str(models_dir), "--corpus", str(swda_dir)],
                     capsys)
    _check_load(summary, local=True)
    # The spawned server's metrics page was read at both ends of the 2 s window: its loop-lag
    # probe (every 0.1 s) fired there, and the buckets found are ordered ranges.
    lag = summary["server_loop_lag"]
    assert lag["probes"] >= 5, lag
    for key in ("p50_ms", "p99_ms", "max_ms"):
        lower, upper = lag[key]
        assert upper is None or lower < upper
    assert lag["p50_ms"][0] <= lag["p99_ms"][0] <= lag["max_ms"][0]


@pytest.mark.corpus
def test_bench_multiplexed_streams(served: Served, swda_dir: Path,
                                   capsys: pytest.CaptureFixture[str]) -> None:
    summary = _bench(["--target", served.target, "--corpus", str(swda_dir), "--multiplex",
                      "-n", "6", "--channels", "2", "--tick-ms", "20"], capsys)
    # --smoke keeps at most 4 conversations and one channel.
    _check_load(summary, local=False)
    assert summary["workload"] == "feed" and summary["multiplex"] is True
    assert summary["tick_ms"] == 20.0 and summary["channels"] == 1
    # Every conversation sent words, in frames: 4 x 3 words/s x 2 s, give or take a phase.
    assert summary["words_sent"] >= 4 * 5


@pytest.mark.corpus
def test_bench_multiplexed_baseline(served: Served, swda_dir: Path,
                                    capsys: pytest.CaptureFixture[str]) -> None:
    summary = _bench(["--target", served.target, "--corpus", str(swda_dir), "--multiplex",
                      "--baseline"], capsys)
    _check_load(summary, local=False)
    assert summary["workload"] == "describe" and summary["multiplex"] is True


@pytest.mark.corpus
def test_multiplexed_load_spreads_over_streams(served: Served, swda_dir: Path) -> None:
    # Seven conversations over three streams (3, 2, 2): all open, every word answered.
    script, _ = load_script(swda_dir, "val", limit=2_000)
    result = asyncio.run(run_load(LoadConfig(
        target=served.target, conversations=7, seconds=1.5, ramp_s=0.1, channels=3,
        multiplex=True), script))
    summary = result.summary()
    _check_load(summary | {"corpus": ""}, local=False)
    assert summary["opened"] == 7


@pytest.mark.corpus
def test_human_report_names_latency_and_errors(served: Served, swda_dir: Path,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["bench", "--smoke", "--target", served.target, "--corpus",
                 str(swda_dir)]) == 0
    out = capsys.readouterr().out
    assert "latency ms   p50" in out
    assert "errors       none" in out


def test_no_corpus_is_a_clear_error(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                    capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("MIDSTREAM_CORPORA", str(tmp_path))
    assert main(["bench", "--smoke", "--target", "127.0.0.1:9"]) == 1
    assert "--corpus" in capsys.readouterr().err


def test_spawned_server_takes_every_conversation_on_one_stream() -> None:
    # 1,200 multiplexed conversations on one stream exceed the default per-stream limit (1,024):
    # a spawned server must be given room for all it is asked to carry, or the run measures a
    # refusal (RESOURCE_EXHAUSTED) instead of the server.
    command = serve_command(models=None, live=1200, spin=False)
    config = build_config(build_parser().parse_args(command[command.index("serve"):]))
    assert config.limits.max_live_conversations == 1200
    assert config.limits.max_channels_per_stream == 1200


def test_frames_stay_within_the_servers_event_limit() -> None:
    # Closing 2,500 conversations at once: a single frame would be over the server's default
    # max_events_per_frame and be refused as a whole, ending the stream (INVALID_ARGUMENT).
    assert ServerLimits().max_events_per_frame == MAX_FRAME_EVENTS
    events = [pb.ChannelEvent(channel=c, event=pb.ClientEvent(close=pb.CloseConversation()))
              for c in range(1, 2501)]
    frames = _frames(events)
    assert [len(f.events) for f in frames] == [1024, 1024, 452]
    assert [e.channel for f in frames for e in f.events] == list(range(1, 2501))
    assert _frames([]) == []


def test_spinning_a_server_it_did_not_start_is_refused(
        swda_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["bench", "--smoke", "--target", "127.0.0.1:9", "--corpus", str(swda_dir),
                 "--spin-idle-cores"]) == 1
    assert "--spawn" in capsys.readouterr().err


def test_unreadable_metrics_page_is_refused_before_the_run(
        swda_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["bench", "--smoke", "--target", "127.0.0.1:9", "--corpus", str(swda_dir),
                 "--server-metrics", "http://127.0.0.1:9/metrics"]) == 1
    assert "http://127.0.0.1:9/metrics" in capsys.readouterr().err


def test_unreachable_server_is_reported_not_hung(swda_dir: Path,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    # Port 9 (discard) has no gRPC server: every open fails with UNAVAILABLE, exit code 3.
    assert main(["bench", "--smoke", "--target", "127.0.0.1:9", "--corpus",
                 str(swda_dir)]) == 3
    captured = capsys.readouterr()
    assert "UNAVAILABLE" in captured.err


@pytest.mark.parametrize("field, value", [("conversations", 0), ("rate", 0.0),
                                          ("rate", math.inf), ("seconds", -1.0),
                                          ("channels", 0), ("tick_s", 0.0), ("tick_s", 2.0)])
def test_load_config_refuses_bad_values(field: str, value: float) -> None:
    with pytest.raises(InputError):
        LoadConfig(**{"target": "x:1", "conversations": 1, field: value})  # type: ignore[arg-type]


def test_word_script_cycles_from_each_conversation_offset() -> None:
    script = WordScript([[("A", "a"), ("B", "b")], [("A", "c")]])
    assert [script.word(0, k) for k in range(4)] == [("A", "a"), ("B", "b"), ("A", "c"),
                                                     ("A", "a")]
    assert script.word(1, 0) == ("A", "c")
    with pytest.raises(InputError):
        WordScript([[], []])


def test_more_conversations_than_transcripts_do_not_speak_in_step() -> None:
    # Conversations 0 and 2 both start in transcript 0, but the second lap starts further in:
    # concurrent conversations never send the same words at the same moment.
    script = WordScript([[("A", f"a{i}") for i in range(3000)], [("B", "b")]])
    first = [script.word(0, k) for k in range(50)]
    second = [script.word(2, k) for k in range(50)]
    assert second[0][1].startswith("a") and second[0] != first[0]
    assert not set(first) & set(second)


def test_percentiles_are_nearest_rank() -> None:
    # Nearest-rank definition (common practice, no source): p-th percentile of n sorted values
    # is the value at rank ceil(p/100 * n).
    values = [k / 1000 for k in range(1, 101)]  # 1 .. 100 ms
    assert _distribution(values) == {"p50": 50.0, "p95": 95.0, "p99": 99.0, "max": 100.0,
                                     "mean": 50.5}
    assert _distribution([]) == dict.fromkeys(("p50", "p95", "p99", "max", "mean"), 0.0)


def test_process_probe_reads_proc() -> None:
    sample = ProcessProbe(os.getpid()).sample()
    assert sample.rss_bytes > 1024 * 1024
    assert sample.cpu_s > 0
    with pytest.raises(InputError, match="/proc/"):
        ProcessProbe(2**22 + 12345).sample()


def test_steal_is_read_per_cpu_from_proc_stat() -> None:
    # /proc/stat layout (proc(5)): "cpuN user nice system idle iowait irq softirq steal ...",
    # in clock ticks; the first line sums every CPU and is not one of them.
    lines = ["cpu  9 0 9 9 0 0 0 7 0 0", "cpu0 4 0 4 4 0 0 0 3 0 0",
             "cpu1 5 0 5 5 0 0 0 4 0 0", "intr 1 2 3", "ctxt 5"]
    assert parse_steal(lines, 100) == (0.03, 0.04)
    assert parse_steal(["cpu0 4 0 4 4 0 0 0"], 100) is None  # a kernel without the counter
    assert parse_steal(["intr 1"], 100) is None
    if os.path.exists("/proc/stat"):
        steal = read_steal()
        assert steal is not None and len(steal) == os.cpu_count()


def _benchmark(name: str, *argv: str, tmp_path: Path) -> dict[str, Any]:
    """``midstream bench NAME --smoke --json FILE ARGV`` in its own process, as a user runs it
    (the benchmarks pin cores and tune the collector, which must not leak into the tests)."""
    out = tmp_path / f"{name}.json"
    done = subprocess.run([sys.executable, "-m", "midstream", "bench", name, "--smoke", "--json",
                           str(out), *argv], capture_output=True, text=True, timeout=240,
                          check=False)
    assert done.returncode == 0, done.stderr
    result: dict[str, Any] = json.loads(out.read_text(encoding="utf-8"))
    assert all(math.isfinite(n) for n in _finite_numbers(result))
    assert {"nproc", "cpu_model", "python", "loadavg"} <= result["machine"].keys()
    return result


def test_bench_decoder_smoke(tmp_path: Path) -> None:
    # Smoke mode times a tiny model on invented words: only the shape of the output is checked.
    result = _benchmark("decoder", tmp_path=tmp_path)
    assert set(result["rows"]) == {"10", "100", "1000"}
    assert all(row["decoder_us"] > 0 and row["floor_us"] > 0 and row["naive_us"] > 0
               for row in result["rows"].values())
    assert result["ratio_1000_over_10"] > 0 and len(result["round_ratios"]) == result["rounds"]
    assert result["words_per_cpu_s"] > 0


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_service_smoke(models_dir: Path, swda_dir: Path, tmp_path: Path) -> None:
    result = _benchmark("service", "--models", str(models_dir), "--corpus",
                     str(swda_dir), tmp_path=tmp_path)
    assert result["engine"]["words_per_cpu_s"] > 0
    (step,) = result["steps"]
    _check_load(step["load"] | {"corpus": ""}, local=True)
    assert step["baseline"]["workload"] == "describe"
    assert step["baseline"]["words_answered"] == step["baseline"]["words_sent"] > 0
    assert result["largest_passing"] in (0, step["conversations"])
    assert result["projected_words_per_core"] > 0


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_service_multiplexed_smoke(models_dir: Path, swda_dir: Path,
                                         tmp_path: Path) -> None:
    # The same size twice: each run is reported, and the size counts only if both met.
    result = _benchmark("service", "--models", str(models_dir), "--corpus",
                     str(swda_dir), "--multiplex", "--steps", "4,4", "--all-steps",
                     tmp_path=tmp_path)
    assert result["multiplex"] is True and result["tick_ms"] > 0
    first, step = result["steps"]
    met = sum(s["passed"] for s in (first, step))
    assert result["runs"] == {"4": {"met": met, "of": 2}}
    assert result["largest_passing"] == (4 if met == 2 else 0)
    _check_load(step["load"] | {"corpus": ""}, local=True)
    assert step["load"]["multiplex"] is True
    assert step["baseline"]["workload"] == "describe" and step["baseline"]["multiplex"] is True
    assert step["baseline"]["words_answered"] == step["baseline"]["words_sent"] > 0


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_memory_smoke(models_dir: Path, swda_dir: Path, tmp_path: Path) -> None:
    result = _benchmark("memory", "--models", str(models_dir), "--corpus",
                     str(swda_dir), tmp_path=tmp_path)
    assert result["service"]["opened"] == 20
    assert result["service"]["error_count"] == 0
    assert result["service"]["rss_held_bytes"] > 0
    # Twenty engines holding five words each allocate something: the measure is not empty.
    assert result["engine"]["bytes_per_engine"] > 0
    assert result["bare_stream"]["opened"] == 20
    assert result["bare_stream"]["error_count"] == 0


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_ingest_smoke(models_dir: Path, swda_dir: Path, tmp_path: Path) -> None:
    result = _benchmark("ingest", "--models", str(models_dir), "--corpus",
                     str(swda_dir), tmp_path=tmp_path)
    # Twenty conversations of twenty words each, every one answered in a reply frame.
    assert result["words"] == 400 and result["reply_bytes_per_word"] > 0
    assert result["engine_ms_per_word"] > 0 and result["server_ms_per_word"] > 0


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_gc_smoke(models_dir: Path, swda_dir: Path, tmp_path: Path) -> None:
    result = _benchmark("gc", "--models", str(models_dir), "--corpus",
                     str(swda_dir), tmp_path=tmp_path)
    assert result["words"] == 400 and result["retained"]["per_word"] >= 0
    # One pass per default threshold setting, each reporting the three generations.
    assert [p["thresholds"] for p in result["passes"]] == [
        [700, 10, 10], [700, 10, 1000000], [700, 1000000, 1000000]]
    assert all(set(p["generations"]) == {"0", "1", "2"} for p in result["passes"])


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_report_smoke_writes_the_page(models_dir: Path, swda_dir: Path,
                                            tmp_path: Path) -> None:
    # The whole pipeline behind docs/benchmarks.md, every benchmark in its smoke mode.
    page = tmp_path / "benchmarks.md"
    # A section 'midstream bench --write-page' wrote is its own run's: it is carried over.
    written = f"{BEGIN}\n## Shared log and workers\n\nfigures of another run\n{END}\n"
    page.write_text(f"# Benchmarks\n\n{written}", encoding="utf-8")
    done = subprocess.run([sys.executable, "-m", "midstream", "bench", "report", "--smoke",
                           "--multiplex", "--spin-steps", "4", "--models", str(models_dir),
                           "--work",
                           str(tmp_path / "work"), "--out", str(page)],
                          capture_output=True, text=True, timeout=300, check=False,
                          env=os.environ | {"MIDSTREAM_CORPORA": str(swda_dir.parent)})
    assert done.returncode == 0, done.stderr
    text = page.read_text(encoding="utf-8")
    for heading in ("## Machine", "## Headline", "## Live conversations per server core",
                    "## Live conversations per server core, multiplexed (FeedMany)",
                    "## The same, server core kept from idling "
                    "(`midstream serve --spin-idle-cores`)",
                    "## Memory per idle live conversation", "## Word decoder alone",
                    "## Reproduce"):
        assert f"\n{heading}\n" in text
    # The three service tables carry the steal and loop-lag columns and one row per step
    # (smoke: one step).
    tables = [line for line in text.splitlines() if line.startswith("| N | offered")]
    assert len(tables) == 3
    assert all("steal ms" in line and "loop lag" in line for line in tables)
    assert len([line for line in text.splitlines() if line.startswith("| 4 | 12 |")]) == 3
    assert "--spin-idle-cores" in text.split("## Reproduce")[1]
    assert text.count(written) == 1
    assert text.index(written) < text.index("\n## Benchmark your own deployment\n")


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_with_redis_compares_server_cpu_per_word_in_one_run(
        models_dir: Path, swda_dir: Path, redis_server: RedisProcess,
        capsys: pytest.CaptureFixture[str]) -> None:
    both = _bench(["--spawn", "--models", str(models_dir), "--corpus", str(swda_dir),
                   "--redis", redis_server.url], capsys)
    for name in ("plain", "redis"):
        _check_load(both[name], local=True)
        assert both[name]["server_cpu_ms_per_word"] > 0
    assert both["cpu_per_word_ratio"] == pytest.approx(
        both["redis"]["server_cpu_ms_per_word"] / both["plain"]["server_cpu_ms_per_word"])


@pytest.mark.parametrize("flags", [["--redis", "redis://127.0.0.1:9/0"], ["--workers", "2"]])
def test_redis_and_workers_apply_to_a_spawned_server_only(
        flags: list[str], swda_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["bench", "--smoke", "--target", "127.0.0.1:9", "--corpus", str(swda_dir),
                 *flags]) == 1
    assert "--spawn" in capsys.readouterr().err


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_redis_smoke(models_dir: Path, swda_dir: Path, tmp_path: Path,
                           redis_server: RedisProcess) -> None:
    result = _benchmark("redis", "--models", str(models_dir), "--corpus",
                     str(swda_dir), "--redis", redis_server.url, tmp_path=tmp_path)
    assert result["words_per_pass"] == 400
    assert result["ms_per_word_plain"] > 0 and result["ms_per_word_shared"] > 0
    assert result["cpu_ratio_median"] > 0
    # Every word's update and input event was written: the streams hold something per word.
    assert result["update_stream_bytes_per_word"] > 0
    assert result["event_stream_bytes_per_word"] > 0


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_scale_out_gives_both_ratios_in_one_run_and_writes_them_into_a_page(
        models_dir: Path, swda_dir: Path, redis_server: RedisProcess, tmp_path: Path,
        capsys: pytest.CaptureFixture[str]) -> None:
    page = tmp_path / "benchmarks.md"
    page.write_text("# Benchmarks\n\n## Headline\n\nkept\n\n## Benchmark your own deployment\n\n"
                    "also kept\n", encoding="utf-8")
    argv = ["--spawn", "--models", str(models_dir), "--corpus", str(swda_dir), "--redis",
            redis_server.url, "--scale-out", "3,2", "--repeats", "2", "--write-page", str(page)]
    result = _bench(argv, capsys)
    for name in ("plain", "redis"):
        _check_load(result[name], local=True)
    # Two pairs in turn; the last pair's runs are given whole, the ratio is the pairs' median.
    first, last = result["cpu_pairs"]
    assert last["plain"] == result["plain"]["server_cpu_ms_per_word"]
    assert last["redis"] == result["redis"]["server_cpu_ms_per_word"]
    for pair in (first, last):
        assert pair["ratio"] == pytest.approx(pair["redis"] / pair["plain"])
    assert result["cpu_per_word_ratio"] == pytest.approx((first["ratio"] + last["ratio"]) / 2)
    one, two = result["workers"]["sweeps"]
    assert (one["workers"], two["workers"]) == (1, 2)
    for sweep in (one, two):
        counts = [step["conversations"] for step in sweep["steps"]]
        assert counts == [2, 3][:len(counts)] and counts  # ascending, stopped at a miss
        assert all(step["passed"] for step in sweep["steps"][:-1])
        assert sweep["largest_passing"] == max(
            [s["conversations"] for s in sweep["steps"] if s["passed"]], default=0)
        for step in sweep["steps"]:
            assert step["load"]["conversations"] == step["conversations"]
            assert step["load"]["server"]["cpu_percent"] >= 0
    expected = two["largest_passing"] / one["largest_passing"] if one["largest_passing"] \
        else None
    assert result["workers"]["ratio"] == expected
    text = page.read_text(encoding="utf-8")
    assert text.count(BEGIN) == 1 and text.count(END) == 1
    assert text.index("kept") < text.index(BEGIN) < text.index(END) \
        < text.index("## Benchmark your own deployment") < text.index("also kept")
    block = text[text.index(BEGIN):text.index(END)]
    assert f"`midstream bench --smoke --json {' '.join(argv)}`" in block
    assert f"**{result['cpu_per_word_ratio']:.2f}x** | ≤ 1.3 |" in block
    assert "median of 2 pairs" in block
    assert "`--workers 2` ÷ `--workers 1`" in block and "| ≥ 1.6 |" in block
    # One table row per step run, on either setting.
    assert sum(line.startswith(("| 1 | ", "| 2 | ")) for line in block.splitlines()) == len(
        one["steps"]) + len(two["steps"])


def test_a_sweep_stops_at_the_first_count_that_misses_the_budget() -> None:
    def measure(n: int) -> dict[str, Any]:
        # An invented server that holds up to 300 conversations within 50 ms.
        return {"conversations": n, "opened": n, "error_count": 0, "words_sent": 10,
                "words_answered": 10, "achieved_wps": 3.0 * n, "server": None,
                "latency_ms": {"p99": 20.0 if n <= 300 else 80.0}}

    sweep = Sweep(workers=1, p99_ms=50.0)
    sweep.run([500, 200, 300, 400], measure)
    assert [(s["conversations"], s["passed"]) for s in sweep.steps] == [
        (200, True), (300, True), (400, False)]
    assert sweep.largest == 300
    missing = Sweep(workers=2, p99_ms=10.0)
    missing.run([200, 300], measure)
    assert missing.largest == 0 and len(missing.steps) == 1


def test_a_run_that_lost_a_word_or_an_open_never_counts_as_held() -> None:
    held = {"conversations": 4, "opened": 4, "error_count": 0, "words_sent": 8,
            "words_answered": 8, "latency_ms": {"p99": 1.0}}
    assert step_passed(held, 50.0)
    assert not step_passed(held | {"opened": 3}, 50.0)
    assert not step_passed(held | {"words_answered": 7}, 50.0)
    assert not step_passed(held | {"error_count": 1}, 50.0)


def test_a_new_run_replaces_the_section_an_earlier_run_wrote(tmp_path: Path) -> None:
    page = tmp_path / "page.md"
    page.write_text("# Page\n\n## Benchmark your own deployment\n\nend\n", encoding="utf-8")
    write_section(page, f"{BEGIN}\nfirst\n{END}\n")
    write_section(page, f"{BEGIN}\nsecond\n{END}\n")
    text = page.read_text(encoding="utf-8")
    assert "first" not in text and text.count(BEGIN) == 1
    assert text == (f"# Page\n\n{BEGIN}\nsecond\n{END}\n\n## Benchmark your own deployment\n\n"
                    "end\n")
    fresh = tmp_path / "fresh.md"
    write_section(fresh, f"{BEGIN}\nonly\n{END}\n")
    assert fresh.read_text(encoding="utf-8") == f"{BEGIN}\nonly\n{END}\n"


def test_scale_out_counts_must_be_positive_numbers(
        swda_dir: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["bench", "--smoke", "--spawn", "--corpus", str(swda_dir), "--redis",
                 "redis://127.0.0.1:9/0", "--scale-out", "100,x"]) == 1
    assert "--scale-out '100,x'" in capsys.readouterr().err
    assert main(["bench", "--smoke", "--spawn", "--corpus", str(swda_dir),
                 "--scale-out", "100"]) == 1
    assert "add --redis URL" in capsys.readouterr().err
    assert main(["bench", "--smoke", "--spawn", "--corpus", str(swda_dir), "--redis",
                 "redis://127.0.0.1:9/0", "--workers", "2", "--write-page", "x.md"]) == 1
    assert "drop --workers 2, or add --scale-out" in capsys.readouterr().err


@pytest.mark.corpus
def test_bench_read_smoke(swda_dir: Path, tmp_path: Path) -> None:
    result = _benchmark("read", "--corpus", str(swda_dir), tmp_path=tmp_path)
    assert result["split"] == "val" and result["repeat"] == 1
    # The parsed words are fewer than the raw tokens (markup, slash units and tags drop out).
    assert 0 < result["words"] < result["raw_tokens"]
    cpu = result["cpu"]
    assert cpu["measured"] > 0 and cpu["baseline"] > 0
    assert cpu["ratio"] == pytest.approx(cpu["measured"] / cpu["baseline"])


@pytest.mark.corpus
@pytest.mark.slow
def test_bench_functions_smoke(models_dir: Path, swda_dir: Path, tmp_path: Path) -> None:
    model = next(path for path in (models_dir / "functions-swbd42.tagger",
                                   models_dir / "functions.tagger") if path.is_file())
    result = _benchmark("functions", "--model", str(model), "--corpus", str(swda_dir),
                        tmp_path=tmp_path)
    assert result["rounds"] == 1 and result["calls"] > 0
    assert result["label_partial_us"] > 0 and result["features_us"] > 0
    pair = result["crfsuite_over_label_partial"]
    assert pair["measured"] == result["crfsuite_us"]
    assert pair["baseline"] == result["label_partial_us"]
    # The fast path and crfsuite label every call alike (the tagger's own contract).
    assert result["labels_differing"] == 0


@pytest.mark.slow
def test_bench_kept_smoke(models_dir: Path, tmp_path: Path) -> None:
    result = _benchmark("kept", "--models", str(models_dir), tmp_path=tmp_path)
    assert result["batches"] == 2 and result["words"] > 0
    # Exit status 0 already says the estimate covers what is kept and stays under the bound.
    assert 0 < result["kept"] <= result["estimate"] <= result["bound"]
    assert result["total"] == result["kept"] + result["rest"]


def test_every_benchmark_is_a_subcommand_with_smoke_and_json() -> None:
    # The harness's one shape: each benchmark runs in seconds with --smoke (what CI and the
    # report's smoke run use) and writes its figures with --json (the report reads them).
    benchmarks = {child.prog.removeprefix("midstream bench "): child
                  for child in _command_parsers(build_parser())
                  if child.prog.startswith("midstream bench ")}
    assert set(benchmarks) == {"decoder", "functions", "read", "ingest", "gc", "memory",
                               "kept", "redis", "service", "soak", "report"}
    for name, parser in benchmarks.items():
        options = {option for action in parser._actions for option in action.option_strings}
        assert "--smoke" in options, name
        # soak prints its checks; report writes the page (--out)
        assert name in {"soak", "report"} or "--json" in options, name


def test_kit_examples_run() -> None:
    # Paired's examples are its documentation: they must hold.
    result = doctest.testmod(_kit)
    assert result.attempted > 0 and result.failed == 0
