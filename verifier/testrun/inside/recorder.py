"""The pytest plugin of the harness: one record per test phase, coverage contexts per test, the filter.

Runs inside the sandbox (standard library, pytest and coverage.py only). In the process that reports
(pytest itself, or pytest-xdist's controller) :mod:`session` registers a :class:`Recorder` that writes
each record as one JSON line to the pipe the supervisor holds; in pytest-xdist's workers the module,
loaded by ``-p``, registers a recorder that only filters and names coverage contexts (the controller
writes the reports the workers send it). PYTEST_DONT_REWRITE: the session imports this module before
pytest starts, so pytest must not try to rewrite its asserts (it has none).

The writer, the JSON encoder and the pipe are bound when the recorder is made, before pytest imports
any module of the tree, so code under test that later replaces ``os.write`` or ``json.dumps`` does not
reach them. Everything in-process can still be reached by determined code; the supervisor's
cross-checks and the static rules stand against that.
"""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterable, Mapping
from typing import Any

import pytest

MESSAGE_CAP = 2000  # characters of a failure's text kept in a record
WORKER_SELECTION = "verifier_selection"  # key of the filter in pytest-xdist's workerinput


def message_of(report: Any) -> str:
    """The end of a report's failure text, capped; empty when there is none or it cannot be shown."""
    try:
        return str(report.longrepr)[-MESSAGE_CAP:] if report.longrepr else ""
    except Exception:
        return ""


def skip_reason(report: Any) -> str:
    """A skip's reason: a skipped report's ``longrepr`` is a (path, line, reason) tuple (pytest's reports)."""
    longrepr = report.longrepr
    if isinstance(longrepr, tuple) and len(longrepr) == 3:
        return str(longrepr[2]).removeprefix("Skipped: ")[-MESSAGE_CAP:]
    return message_of(report)


def relative_path(path: str, root: str) -> str:
    return os.path.relpath(path, root).replace(os.sep, "/")


def chosen(node_ids: Iterable[str], paths: Mapping[str, str], selection: Mapping[str, Any] | None) -> list[str]:
    """The node ids the filter keeps, in their order: selected ids, selected files, and this shard's share.

    ``paths`` maps each node id to its file (relative to the workspace); no ``selection`` keeps all.
    """
    ordered = list(node_ids)
    if selection is None:
        return ordered
    wanted, files = set(selection.get("node_ids", ())), set(selection.get("files", ()))
    keep = [n for n in ordered if selection.get("whole_suite") or n in wanted or paths.get(n) in files]
    shard = selection.get("shard")
    if shard:
        index, total = int(shard[0]), int(shard[1])
        mine = set(sorted(keep)[index - 1 :: total])
        keep = [n for n in keep if n in mine]
    return keep


# pytest 9's own report of one subtest (``self.subTest`` in a unittest case, the ``subtests`` fixture), and
# the earlier plugin's: extra reports of a test's call, which say whether that part of the test failed
SUBTEST_REPORTS = ("SubtestReport", "SubTestReport")


def phase_record(report: Any) -> dict[str, Any]:
    """The record of one test phase (setup, call or teardown), or of one subtest within the call."""
    subtest = type(report).__name__ in SUBTEST_REPORTS
    return {
        "kind": "subtest" if subtest else "phase",
        "nodeid": str(report.nodeid),
        "when": str(report.when),
        "outcome": str(report.outcome),
        "xfail": hasattr(report, "wasxfail"),
        "duration": float(getattr(report, "duration", 0.0) or 0.0),
        "fixtures": getattr(report, "verifier_fixtures", None),
        "message": message_of(report) if report.outcome != "passed" else "",
    }


def _switch_context(label: str) -> None:
    try:
        import coverage
    except ImportError:
        return
    current = coverage.Coverage.current()
    if current is not None:
        current.switch_context(label)


class Recorder:
    """The plugin object; ``send`` is None where this process does not report (an xdist worker)."""

    def __init__(self, send: Callable[[dict[str, Any]], None] | None, selection: Mapping[str, Any] | None) -> None:
        self.send = send
        self.selection = selection
        self.contexts: list[str] = []
        self.collected_sent = False

    # -- coverage contexts: the running test's node id, or fixture:<name> while a fixture is set up --

    def _enter(self, label: str) -> None:
        self.contexts.append(label)
        _switch_context(label)

    def _leave(self) -> None:
        self.contexts.pop()
        _switch_context(self.contexts[-1] if self.contexts else "")

    @pytest.hookimpl(hookwrapper=True)
    def pytest_runtest_protocol(self, item: pytest.Item, nextitem: pytest.Item | None) -> Any:
        self._enter(item.nodeid)
        yield
        self._leave()

    @pytest.hookimpl(hookwrapper=True)
    def pytest_fixture_setup(self, fixturedef: Any, request: Any) -> Any:
        # A fixture's setup runs once for every test of its scope: its lines belong to all tests using it.
        self._enter("fixture:" + str(fixturedef.argname))
        yield
        self._leave()

    @pytest.hookimpl(hookwrapper=True)
    def pytest_runtest_makereport(self, item: pytest.Item, call: Any) -> Any:
        outcome = yield
        if call.when == "setup":  # travels with the report from an xdist worker to the controller
            outcome.get_result().verifier_fixtures = sorted(getattr(item, "fixturenames", ()))

    # -- the filter and the collected count -----------------------------------------------------------

    @pytest.hookimpl(trylast=True)
    def pytest_collection_modifyitems(self, session: Any, config: Any, items: list[Any]) -> None:
        root = str(config.rootpath)
        by_id = {item.nodeid: item for item in items}
        paths = {item.nodeid: relative_path(str(item.path), root) for item in items}
        kept = set(chosen(by_id, paths, self.selection))
        dropped = [item for item in items if item.nodeid not in kept]
        if dropped:
            config.hook.pytest_deselected(items=dropped)
            items[:] = [item for item in items if item.nodeid in kept]
        self._collected(len(items))

    @pytest.hookimpl(optionalhook=True)
    def pytest_xdist_node_collection_finished(self, node: Any, ids: list[str]) -> None:
        self._collected(len(ids))  # every worker collects the same items; the first one says how many

    def _collected(self, count: int) -> None:
        if self.send is not None and not self.collected_sent:
            self.collected_sent = True
            shard = self.selection.get("shard") if self.selection else None
            self.send({"kind": "collected", "count": count, "shard": shard})

    # -- the records ----------------------------------------------------------------------------------

    def pytest_collectreport(self, report: Any) -> None:
        if self.send is not None and report.failed:
            self.send({"kind": "collect-error", "nodeid": str(report.nodeid), "message": message_of(report)})
        elif self.send is not None and report.skipped:  # a module-level skip: its tests are never collected
            self.send({"kind": "collect-skip", "nodeid": str(report.nodeid), "message": skip_reason(report)})

    def pytest_runtest_logstart(self, nodeid: str, location: Any) -> None:
        if self.send is not None:  # for the progress display only; the judged records are the phases
            self.send({"kind": "start", "nodeid": str(nodeid)})

    def pytest_runtest_logreport(self, report: Any) -> None:
        if self.send is not None:
            self.send(phase_record(report))

    @pytest.hookimpl(trylast=True)
    def pytest_sessionfinish(self, session: Any, exitstatus: int) -> None:
        if self.send is not None:
            self.send({"kind": "finish", "exitstatus": int(exitstatus)})

    @pytest.hookimpl(optionalhook=True)
    def pytest_configure_node(self, node: Any) -> None:
        node.workerinput[WORKER_SELECTION] = json.dumps(self.selection)


def pipe_writer(fd: int) -> Callable[[dict[str, Any]], None]:
    """A writer of JSON-line records to ``fd``, with the primitives it uses bound now."""
    write, dumps = os.write, json.dumps

    def send(record: dict[str, Any]) -> None:
        data = (dumps(record, separators=(",", ":")) + "\n").encode("utf-8", "replace")
        while data:
            data = data[write(fd, data) :]

    return send


def pytest_configure(config: Any) -> None:
    """In a pytest-xdist worker: register the filtering, context-naming recorder (it writes nothing)."""
    workerinput = getattr(config, "workerinput", None)
    if workerinput is not None and WORKER_SELECTION in workerinput:
        selection = json.loads(workerinput[WORKER_SELECTION])
        config.pluginmanager.register(Recorder(None, selection), "verifier-recorder-worker")
