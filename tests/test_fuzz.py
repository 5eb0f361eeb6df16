"""Everything the project receives goes through one fuzz harness
(ionotrail.harness.testing.fuzz): every corpus input is replayed on every run,
each target gets a modest seeded run, and ``--hypothesis-profile=thorough``
runs ten million inputs across the targets in two processes.

A corpus file tests/corpus/<target>/<hash> is an input that once escaped its
consumer with an exception outside the target's allowed family (or broke an
invariant the consumer asserts), or an interesting seed; replaying it must now
end in "ok" or an allowed refusal.  Inputs that expose a defect in a module
this suite may not change yet are listed in KNOWN_FAILURES and replay as
strict xfails, so the day the defect is fixed the list must shrink.
"""

from __future__ import annotations

import json
import random
import subprocess
import sys
from pathlib import Path

import pytest
from ionotrail.harness.testing import fuzz
from ionotrail.terminal.errors import DecodeError

from tests.test_decode_hostile import DECODE_WORKSPACE

CORPUS = Path(__file__).parent / "corpus"

KNOWN_FAILURES: dict[str, str] = {}
"""corpus path (target/name) -> the defect it shows, for defects in modules owned elsewhere."""


def corpus_files() -> list[tuple[str, Path]]:
    return sorted((path.parent.name, path) for path in CORPUS.glob("*/*") if path.is_file())


def _replay_params() -> list[object]:
    params = []
    for target, path in corpus_files():
        key = f"{target}/{path.name}"
        marks = [pytest.mark.xfail(strict=True, reason=KNOWN_FAILURES[key])] if key in KNOWN_FAILURES else []
        params.append(pytest.param(target, path, id=key, marks=marks))
    return params


@pytest.mark.parametrize(("target", "path"), _replay_params())
def test_corpus_input_is_refused_cleanly(target: str, path: Path) -> None:
    data = path.read_bytes()
    name, exc = fuzz.outcome(fuzz.TARGETS[target], data)
    assert exc is None, f"{target} {path.name}: {name}: {exc}"


def test_the_corpus_names_registered_targets_and_content_hashes() -> None:
    files = corpus_files()
    assert files, "the corpus holds the failing inputs found so far"
    for target, path in files:
        assert target in fuzz.TARGETS, f"tests/corpus/{target} names no registered target"
        assert path.name == fuzz.corpus_name(path.read_bytes()), f"{path} is not named by its content hash"
    assert set(KNOWN_FAILURES) <= {f"{t}/{p.name}" for t, p in files}


def test_memory_bound_is_the_one_the_hostile_decode_tests_declare() -> None:
    assert fuzz.DECODE_WORKSPACE == DECODE_WORKSPACE


# --- the harness itself ----------------------------------------------------------------


def test_every_seed_is_accepted_by_its_target() -> None:
    for target in fuzz.TARGETS.values():
        seeds = target.seeds()
        assert seeds, target.name
        for data in seeds:
            name, exc = fuzz.outcome(target, data)
            assert exc is None, f"{target.name} fails on its own seed {data[:60]!r}: {exc!r}"
            # The fast-path target steers frames of other types onto a fast decoder, which refuses them.
            assert name == "ok" or target.name == "fastpath", (
                f"{target.name} refuses its own seed {data[:60]!r}: {name}"
            )


def test_generation_is_deterministic_per_seed() -> None:
    for name in ("wire", "link", "scenario", "line_kiss"):
        target = fuzz.TARGETS[name]
        first = list(target.generate(5, 200))
        assert first == list(target.generate(5, 200))
        assert first != list(target.generate(6, 200))
        assert len(set(first)) > 150, f"{name}: the mutator repeats itself"


def test_a_failure_is_counted_minimised_and_saved_by_content_hash(tmp_path: Path) -> None:
    def consume(data: bytes) -> None:
        if b"\xc0\xc0" in data:
            raise KeyError("a broken consumer")
        if len(data) % 7 == 0:
            raise DecodeError("refused")

    broken = fuzz.Target(
        "broken", consume, lambda: [bytes(range(40))], (DecodeError,), fuzz.mutate_bytes, tokens=(b"\xc0",)
    )
    result = fuzz.run(broken, seed=1, count=3000, corpus=tmp_path)
    assert result["outcomes"]["DecodeError"] > 0 and result["outcomes"]["ok"] > 0
    failures = result["failures"]
    assert list(failures) == [next(iter(failures))] and next(iter(failures)).startswith("KeyError at test_fuzz.py:")
    assert result["outcomes"]["FAIL KeyError"] == failures[next(iter(failures))]["count"] > 0
    (saved,) = (tmp_path / "broken").iterdir()
    assert saved.read_bytes() == b"\xc0\xc0", "minimised to the two bytes that matter"
    assert saved.name == fuzz.corpus_name(b"\xc0\xc0")
    assert fuzz.outcome(broken, saved.read_bytes())[0] == "FAIL KeyError"
    assert fuzz.run(broken, seed=1, count=3000, save=False)["outcomes"] == result["outcomes"]


def test_text_mutants_stay_mostly_text() -> None:
    rng = random.Random(3)
    seeds = fuzz.scenario_seeds()
    mutants = [fuzz.mutate_text(rng, seeds[0], seeds, fuzz.SCENARIO_TOKENS) for _ in range(500)]
    readable = sum(1 for m in mutants if m.isascii() or _utf8(m))
    assert 300 < readable < 500, "mostly text, with some invalid UTF-8"
    assert sum(m != seeds[0] for m in mutants) > 490


def _utf8(data: bytes) -> bool:
    try:
        data.decode("utf-8")
    except UnicodeDecodeError:
        return False
    return True


def test_stream_inputs_round_trip() -> None:
    items = [(0x85, b"\x12\x34"), (0x01, b""), (0xFF, bytes(300))]
    assert [(round(g, 3), s, f) for g, s, f in fuzz.stream_items(fuzz.pack_stream(items))] == [
        (0.02, 25.0, b"\x12\x34"), (0.004, 4.0, b""), (0.508, 25.0, bytes(300)),
    ]  # fmt: skip
    assert list(fuzz.stream_items(b"\x00\x00\x05ab")) == [(0.0, 4.0, b"ab")], "a cut-short item takes what is left"


def test_bounds_checks_catch_an_overfull_endpoint() -> None:
    link = fuzz.make_link(0)
    while link.sender.can_queue():
        link.sender.queue(b"x", 0.0)
    fuzz.link_bounds(link)
    for k in range(link.limits.max_queued_replies + 3):  # the memory drops the oldest: still within bounds
        link.commands.arrived(k)
        link.commands.answered(k, bytes([k]))
    fuzz.link_bounds(link)
    link.commands._queue.extend([b"x"] * 10)  # as a defect that forgot to drop would leave it
    with pytest.raises(AssertionError, match="queued replies"):
        fuzz.link_bounds(link)
    master = fuzz.make_master()
    fuzz.master_bounds(master)
    for k in range(master.limits.max_ack_news + 1):
        master._news[(k, k)] = None
    with pytest.raises(AssertionError, match="acknowledgement news"):
        fuzz.master_bounds(master)


# --- modest runs in the default suite ----------------------------------------------------

DEFAULT_COUNTS = {"wire": 6000, "fastpath": 4000, "records": 4000, "deframer": 3000, "line_kiss": 3000}
"""Inputs per target in the default suite (the rest get 1500): about 15 s in all on one core."""


@pytest.mark.parametrize("name", sorted(fuzz.TARGETS))
def test_fuzz_target(name: str) -> None:
    target = fuzz.TARGETS[name]
    count = DEFAULT_COUNTS.get(name, 1500)
    result = fuzz.run(target, seed=20261202, count=count, memory_every=50 if target.memory_bound else 0)
    print(json.dumps(result))
    assert not result["failures"], f"saved to the corpus: {result['failures']}"
    assert sum(result["outcomes"].values()) == count
    if target.memory_bound is not None:
        assert 0 < result["peak_bytes"] <= target.memory_bound
    if target.allowed == (DecodeError,):  # the mutants reach past the checks as well as into them
        assert result["outcomes"].get("ok", 0) > count // 50
        assert len(result["outcomes"]) >= (4 if name in ("wire", "fastpath", "records") else 2)  # the frame decoders' reasons


@pytest.mark.parametrize("endpoint", ["link", "master"])
def test_endpoint_stays_bounded_over_a_long_hostile_stream(endpoint: str) -> None:
    result = fuzz.long_stream(endpoint, seed=4, frames=4000, check_every=200)
    assert result["frames"] >= 4000


def test_command_line_entry_point_prints_one_json_object() -> None:
    run = subprocess.run(
        [sys.executable, "-m", "ionotrail.harness.testing.fuzz", "--count", "300", "--workers", "1", "--target", "wire", "--target", "records", "--no-save"],
        capture_output=True, text=True, timeout=120, check=False,
    )  # fmt: skip
    assert run.returncode == 0, run.stderr
    result = json.loads(run.stdout)
    assert result["inputs"] == 300 and result["failures"] == 0
    assert set(result["targets"]) == {"wire", "records"}
    assert {"elapsed_s", "rate_per_s", "workers"} <= set(result)


# --- the thorough run ------------------------------------------------------------------

THOROUGH_INPUTS = 10_000_000


@pytest.mark.thorough
def test_ten_million_inputs(tmp_path: Path) -> None:
    result = fuzz.run_many(THOROUGH_INPUTS, workers=2, seed=2026, memory_every=5000)
    streams = [fuzz.long_stream(endpoint, seed=9, frames=100_000) for endpoint in ("link", "master")]
    result["long_streams"] = streams
    report = json.dumps(result, indent=1)
    print(report)
    (tmp_path / "fuzz-thorough.json").write_text(report, encoding="utf-8")
    assert result["inputs"] >= THOROUGH_INPUTS
    assert result["failures"] == 0, (
        f"saved to the corpus: { {n: t['failures'] for n, t in result['targets'].items() if t['failures']} }"
    )
    for name, outcome in result["targets"].items():
        bound = fuzz.TARGETS[name].memory_bound
        if bound is not None:
            assert 0 < outcome["peak_bytes"] <= bound, name
