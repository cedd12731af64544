"""The host's checks of a sealed run, on data: the seal, exit codes, phases, counts and re-runs."""

from __future__ import annotations

import hashlib
import hmac
import json
from typing import Any

import pytest

from verifier.testrun.integrity import open_seal, read_reruns, read_session

KEY = b"k" * 32


def phase(node: str, when: str, outcome: str = "passed", **extra: Any) -> dict[str, Any]:
    return {"kind": "phase", "nodeid": node, "when": when, "outcome": outcome, "duration": 0.01, **extra}


def test_records(node: str, call: str = "passed") -> list[dict[str, Any]]:
    return [phase(node, "setup"), phase(node, "call", call), phase(node, "teardown")]


test_records.__test__ = False  # type: ignore[attr-defined]  # a helper, not a test


def session(records: list[dict[str, Any]], exit_code: int, returncode: int | None = None, **extra: Any) -> dict:
    """A session as the supervisor seals it; pytest's exit codes from pytest's docs ("Exit codes")."""
    tail = [{"kind": "finish", "exitstatus": exit_code}, {"kind": "coverage", "sha256": "0"}]
    tail.append({"kind": "end", "exit": exit_code})
    return {"returncode": exit_code if returncode is None else returncode, "records": records + tail, **extra}


def collected(count: int) -> dict[str, Any]:
    return {"kind": "collected", "count": count, "shard": None}


def test_a_clean_run_reads_as_it_ran() -> None:
    reading = read_session(session([collected(2), *test_records("t::a"), *test_records("t::b", "failed")], 1))
    assert reading.problems == ()
    assert [(t.node_id, t.outcome) for t in reading.tests] == [("t::a", "passed"), ("t::b", "failed")]


def test_setup_failure_needs_no_call_phase() -> None:
    records = [collected(1), phase("t::a", "setup", "failed"), phase("t::a", "teardown")]
    reading = read_session(session(records, 1))
    assert reading.problems == () and reading.tests[0].outcome == "error"


@pytest.mark.parametrize(
    ("records", "exit_code", "expected"),
    [
        ([collected(1), phase("t::a", "setup")], 0, "no teardown phase"),
        ([collected(1), phase("t::a", "setup"), phase("t::a", "teardown")], 0, "no call phase"),
        ([collected(2), *test_records("t::a")], 0, "2 tests collected but 1 recorded"),
        ([*test_records("t::a")], 0, "did not report how many"),
        ([collected(1), *test_records("t::a"), phase("t::a", "call", "passed")], 0, "at most once"),
        ([collected(1), *test_records("t::a")], 1, "no failure was recorded"),
        ([collected(1), *test_records("t::a", "failed")], 0, "a failure was recorded"),
    ],
)
def test_shapes_that_cannot_be_trusted(records: list[dict[str, Any]], exit_code: int, expected: str) -> None:
    reading = read_session(session(records, exit_code))
    assert any(expected in problem for problem in reading.problems), reading.problems


def test_ended_without_its_end_record() -> None:
    """os._exit(0) from a test: the process exits 0, but pytest never reported its end."""
    reading = read_session({"returncode": 0, "records": [collected(2), *test_records("t::a")]})
    assert reading.exit_code is None and "without reporting its end" in reading.problems[0]


def test_killed_by_a_signal() -> None:
    reading = read_session({"returncode": -9, "records": [collected(1)]})
    assert reading.problems == ("the test session was killed by signal 9",)


def test_exit_codes_must_agree() -> None:
    reading = read_session(session([collected(1), *test_records("t::a")], 0, returncode=3))
    assert "exit codes disagree" in reading.problems[0]


def test_records_after_the_end_are_refused() -> None:
    part = session([collected(1), *test_records("t::a")], 0)
    part["records"].append(phase("t::b", "call"))
    assert any("after the session's end" in p for p in read_session(part).problems)


@pytest.mark.parametrize("flag", ["overflow", "held_open", "bad_lines"])
def test_channel_trouble_is_a_problem(flag: str) -> None:
    reading = read_session(session([collected(1), *test_records("t::a")], 0, **{flag: 1}))
    assert len(reading.problems) == 1


def test_no_tests_and_usage_errors_are_not_runs() -> None:
    for code in (2, 3, 4, 5):
        assert read_session(session([], code)).exit_code == code  # the caller maps them to statuses


def test_the_seal() -> None:
    body = json.dumps({"format": 1, "run": {}}).encode()
    sealed = hmac.new(KEY, body, hashlib.sha256).hexdigest().encode() + b"\n" + body
    assert open_seal(sealed, KEY) == ({"format": 1, "run": {}}, None)
    assert "altered" in str(open_seal(sealed.replace(b'"run"', b'"fun"'), KEY)[1])
    assert "altered" in str(open_seal(sealed, b"other" * 8)[1])
    assert "left no sealed" in str(open_seal(None, KEY)[1])


def test_a_rerun_counts_only_when_trustworthy() -> None:
    good = {**session([collected(1), *test_records("t::a")], 0), "asked": ["t::a"]}
    forged = {**session([collected(1), *test_records("t::a"), *test_records("t::z")], 0), "asked": ["t::a"]}
    assert read_reruns([good]).passed == {"t::a"}
    assert read_reruns([forged]).passed == frozenset()
    assert read_reruns([forged]).attempts == {"t::a": 2}


def test_a_module_level_skip_is_read_as_the_skipped_file_and_its_reason() -> None:
    # pytest reports a module-level skip as a skipped collection report of the file (pytest docs, skipping);
    # exit code 5: no tests collected (pytest docs, "Exit codes")
    skip = {"kind": "collect-skip", "nodeid": "tests/test_native.py", "message": "could not import 'native'"}
    reading = read_session(session([skip, collected(0)], 5))
    assert reading.problems == ()
    assert dict(reading.skipped_modules) == {"tests/test_native.py": "could not import 'native'"}


def test_a_skip_record_without_a_file_names_nothing() -> None:
    reading = read_session(session([{"kind": "collect-skip", "nodeid": 7}, collected(0)], 5))
    assert dict(reading.skipped_modules) == {}
