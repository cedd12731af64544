"""Reading the sealed results of a run on the host: the seal, the records, and every cross-check.

Everything here is pure: it takes the bytes the sandbox brought back (untrusted) and the key the gate
made for the run, and says what the run showed, or why it shows nothing. A session counts as run only
when all of these agree: the seal is intact; the child's exit code, the ``finish`` record (pytest's
exit status) and the ``end`` record are one and the same, and are 0 or 1 (pytest's documented exit
codes "all passed" and "some failed"); exit 1 goes with a failure and exit 0 with none; exactly the
collected tests have records, each with its setup and teardown phases and, when the setup passed, its
call phase; no phase twice (a subtest's report is a record of its own kind, and a failed one fails its
test); nothing after the end. Any other shape is a problem: the gate cannot verify.
"""

from __future__ import annotations

import hashlib
import hmac
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

from verifier.models import TestOutcome
from verifier.words import counted, plural

SEAL_FORMAT = 1
PHASES = ("setup", "call", "teardown")
OUTCOMES = ("passed", "failed", "skipped")
TEXT_CAP = 4000  # characters of any text field kept from a record
# pytest's exit codes (pytest docs, "Exit codes"): 0 all passed, 1 some failed, 2 interrupted,
# 3 internal error, 4 usage error, 5 no tests collected.
RAN = (0, 1)
NO_TESTS = 5


@dataclass(frozen=True)
class SessionReading:
    """What one pytest session (the run or a re-run) showed, and what is wrong with it."""

    exit_code: int | None
    tests: tuple[TestOutcome, ...] = ()
    collection_errors: tuple[str, ...] = ()
    collected: int | None = None
    shard: Any = None
    problems: tuple[str, ...] = ()
    skipped_modules: Mapping[str, str] = field(default_factory=dict)  # collected file -> its module-level skip

    @property
    def trustworthy(self) -> bool:
        return not self.problems


def open_seal(data: bytes | None, key: bytes) -> tuple[dict[str, Any] | None, str | None]:
    """The sealed body, or why it cannot be used."""
    if not data:
        return None, "the harness left no sealed results (the supervisor did not finish)"
    mac, _newline, body = data.partition(b"\n")
    expected = hmac.new(key, body, hashlib.sha256).hexdigest().encode()
    if not hmac.compare_digest(mac, expected):
        return None, "the sealed results do not match their seal: they were altered inside the sandbox"
    try:
        value = json.loads(body)
    except ValueError:
        return None, "the sealed results are not JSON"
    if not isinstance(value, dict) or value.get("format") != SEAL_FORMAT:
        return None, "the sealed results have an unknown format"
    return value, None


def _text(value: Any) -> str:
    return value[:TEXT_CAP] if isinstance(value, str) else ""


def _last_line(message: str) -> str:
    lines = [line for line in message.strip().splitlines() if line.strip()]
    return lines[-1].strip() if lines else "no message"


def _int(value: Any) -> int | None:
    return value if isinstance(value, int) and not isinstance(value, bool) else None


def read_session(part: Any, asked: Sequence[str] | None = None) -> SessionReading:
    """Check one session's records (``asked``: the node ids a re-run was given) and fold them into outcomes."""
    if not isinstance(part, dict) or not isinstance(part.get("records"), list):
        return SessionReading(None, problems=("a test session left no records",))
    problems: list[str] = []
    returncode = _int(part.get("returncode"))
    if part.get("overflow"):
        problems.append("the test session sent more records than the harness reads")
    if part.get("held_open"):
        problems.append("a process left behind by the tests held the results channel open")
    if part.get("bad_lines"):
        bad = part["bad_lines"]
        problems.append(
            f"{counted(bad, 'line')} on the results channel {plural(bad, 'was not a record', 'were not records')}"
        )
    phases, errors, collected, shard, finish, end = _walk(part["records"], problems)
    exit_code = _exit_code(returncode, finish, end, problems)
    tests = tuple(_fold(node_id, records) for node_id, records in phases.items())
    if exit_code in RAN:
        _check_phases(phases, problems)
        _check_counts(len(phases), collected, asked, phases, problems)
        _check_exit(exit_code, tests, errors, problems)
    skips = _module_skips(part["records"])
    return SessionReading(exit_code, tests, tuple(errors), collected, shard, tuple(problems), skips)


def _module_skips(records: list[Any]) -> dict[str, str]:
    """The files whose collection skipped (``pytest.skip(allow_module_level=True)``, a module-level
    ``pytest.importorskip``): file -> the skip's reason."""
    return {
        _text(record.get("nodeid")): _last_line(_text(record.get("message")))
        for record in records
        if isinstance(record, dict) and record.get("kind") == "collect-skip" and _text(record.get("nodeid"))
    }


def _walk(
    records: list[Any], problems: list[str]
) -> tuple[dict[str, list[dict[str, Any]]], list[str], int | None, Any, int | None, int | None]:
    """Sort the records by kind, noting any that break the protocol."""
    phases: dict[str, list[dict[str, Any]]] = {}
    errors: list[str] = []
    collected: int | None = None
    shard: Any = None
    finish = end = None
    for record in records:
        if not isinstance(record, dict):
            problems.append("a record on the results channel is not an object")
            continue
        kind = record.get("kind")
        if end is not None:
            problems.append(f"a '{kind}' record arrived after the session's end")
            continue
        if kind in ("phase", "subtest"):  # a test's subtests travel with its phases; only a failure counts
            node_id = _text(record.get("nodeid"))
            phases.setdefault(node_id, []).append(record)
        elif kind == "collect-error":
            errors.append(f"{_text(record.get('nodeid')) or '<session>'}: {_last_line(_text(record.get('message')))}")
        elif kind == "collected":
            if collected is not None:
                problems.append("the collected count was reported twice")
            collected, shard = _int(record.get("count")), record.get("shard")
        elif kind == "finish":
            finish = _int(record.get("exitstatus"))
        elif kind == "end":
            end = _int(record.get("exit"))
            if end is None:
                problems.append("the session's end record has no exit code")
        elif kind == "shadowed":
            problems += _shadowed(record.get("modules"))
        elif kind not in ("coverage", "start", "collect-skip"):  # a test's start feeds only the progress display
            problems.append(f"an unknown record kind on the results channel: {str(kind)[:40]!r}")
    return phases, errors, collected, shard, finish, end


def _exit_code(returncode: int | None, finish: int | None, end: int | None, problems: list[str]) -> int | None:
    """pytest's exit code, when the process, pytest and the session's end all say the same."""
    if returncode is not None and returncode < 0:
        problems.append(f"the test session was killed by signal {-returncode}")
        return None
    if end is None:
        problems.append(
            f"the test session ended (exit {returncode}) without reporting its end: "
            "it was ended early (os._exit, a signal, or an exit from inside a test)"
        )
        return None
    if finish != end or returncode != end:
        problems.append(f"exit codes disagree: process {returncode}, pytest {finish}, session end {end}")
        return None
    return end


def _shadowed(modules: Any) -> list[str]:
    """Why a run whose tree modules resolve elsewhere did not test the committed code."""
    if not isinstance(modules, dict) or not modules:
        return ["a malformed record of shadowed modules"]
    problems = []
    for name, where in list(modules.items())[:5]:
        problems.append(
            f"the tree's module {_text(name)[:100]!r} would be imported from {_text(where)[:200]}, not from the "
            "committed tree, so the tests would not run the committed code; run the gate from an environment "
            f"where {_text(name)[:100]!r} is not installed (a virtual environment of its own), or with --sandbox docker"
        )
    if len(modules) > 5:
        problems.append(f"and {len(modules) - 5} more modules of the tree are shadowed the same way")
    return problems


def _check_phases(phases: Mapping[str, list[dict[str, Any]]], problems: list[str]) -> None:
    for node_id, every in phases.items():
        records = [r for r in every if r.get("kind") != "subtest"]
        if not records:
            problems.append(f"{node_id}: subtests recorded, but none of the test's own phases")
            continue
        seen = [str(r.get("when")) for r in records]
        outcomes = {str(r.get("when")): r.get("outcome") for r in records}
        if len(seen) != len(set(seen)) or not set(seen) <= set(PHASES):
            problems.append(f"{node_id}: phases recorded {seen}, each of setup/call/teardown at most once")
        elif "setup" not in outcomes or "teardown" not in outcomes:
            problems.append(f"{node_id}: no {'setup' if 'setup' not in outcomes else 'teardown'} phase recorded")
        elif outcomes["setup"] == "passed" and "call" not in outcomes:
            problems.append(f"{node_id}: its setup passed but no call phase was recorded")
        if any(r.get("outcome") not in OUTCOMES for r in every):
            problems.append(f"{node_id}: an unknown outcome")


def _check_counts(
    recorded: int,
    collected: int | None,
    asked: Sequence[str] | None,
    phases: Mapping[str, Any],
    problems: list[str],
) -> None:
    if collected is None:
        problems.append("the session did not report how many tests it collected")
    elif recorded != collected:
        problems.append(f"{counted(collected, 'test')} collected but {recorded} recorded")
    if asked is not None and not set(phases) <= set(asked):
        problems.append("a re-run recorded tests it was not asked to run")


def _check_exit(exit_code: int, tests: tuple[TestOutcome, ...], errors: list[str], problems: list[str]) -> None:
    failed = any(test.outcome in ("failed", "error") for test in tests) or bool(errors)
    if exit_code == 1 and not failed:
        problems.append("pytest said tests failed (exit 1) but no failure was recorded")
    if exit_code == 0 and failed:
        problems.append("pytest said all passed (exit 0) but a failure was recorded")


def _fold(node_id: str, records: list[dict[str, Any]]) -> TestOutcome:
    """One outcome from a test's phases: a failed call fails, a failed setup or teardown is an error."""
    own_phases = [r for r in records if r.get("kind") != "subtest"]
    duration = sum(float(r["duration"]) for r in own_phases if isinstance(r.get("duration"), (int, float)))
    fixtures_value: list[Any] = next((r["fixtures"] for r in records if isinstance(r.get("fixtures"), list)), [])
    fixtures = tuple(str(name)[:200] for name in fixtures_value[:500])
    for record in records:  # in the order they came: a failed subtest fails the test, though its call passed
        if record.get("outcome") == "failed":
            outcome: Literal["failed", "error"] = "failed" if record.get("when") == "call" else "error"
            return TestOutcome(node_id, outcome, _text(record.get("message")), duration, fixtures=fixtures)
    if any(r.get("outcome") == "skipped" for r in own_phases):
        return TestOutcome(node_id, "skipped", "", duration, fixtures=fixtures)
    return TestOutcome(node_id, "passed", "", duration, fixtures=fixtures)


@dataclass(frozen=True)
class Reruns:
    """What the re-runs of failing tests showed: the tests that passed on one, and how many runs each took."""

    passed: frozenset[str] = frozenset()
    attempts: Mapping[str, int] = field(default_factory=dict)


def read_reruns(parts: Any) -> Reruns:
    """Re-runs count only when their session is trustworthy; an untrustworthy one shows no pass."""
    passed: set[str] = set()
    attempts: dict[str, int] = {}
    for part in parts if isinstance(parts, list) else []:
        asked = part.get("asked") if isinstance(part, dict) else None
        if not isinstance(asked, list):
            continue
        asked = [str(n) for n in asked]
        reading = read_session(part, asked)
        for node_id in asked:
            attempts[node_id] = attempts.get(node_id, 1) + 1
        if reading.trustworthy:
            passed |= {t.node_id for t in reading.tests if t.outcome == "passed"}
    return Reruns(frozenset(passed), attempts)
