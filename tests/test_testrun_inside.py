"""The in-sandbox harness as ordinary code: its functions on data, and whole runs of it on real trees.

The modules under ``verifier/testrun/inside`` are imported here directly (they need only the standard
library, pytest and coverage.py); the runs copy them into a tree the way the gate does and read the
sealed result with the host's reader.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import coverage
import pytest
from conftest import test_sandbox

from verifier import sandbox
from verifier.models import Policy, RunResult, SandboxResult, Selection
from verifier.testrun import harness
from verifier.testrun.inside import recorder, session, supervisor
from verifier.testrun.integrity import open_seal


def test_chosen_keeps_ids_files_and_the_shard() -> None:
    ids = ["t/a.py::x", "t/a.py::y", "t/b.py::z", "t/c.py::w"]
    paths = {n: n.split("::")[0] for n in ids}
    assert recorder.chosen(ids, paths, None) == ids
    selection = {"whole_suite": False, "node_ids": ["t/a.py::y"], "files": ["t/b.py"], "shard": None}
    assert recorder.chosen(ids, paths, selection) == ["t/a.py::y", "t/b.py::z"]
    shard = {"whole_suite": True, "shard": [2, 2]}
    assert recorder.chosen(ids, paths, shard) == ["t/a.py::y", "t/c.py::w"]  # every 2nd of the sorted ids


def test_pipe_writer_writes_one_json_line_per_record() -> None:
    read_end, write_end = os.pipe()
    send = recorder.pipe_writer(write_end)
    send({"kind": "phase", "nodeid": "t::ä"})
    send({"kind": "end", "exit": 0})
    os.close(write_end)
    with os.fdopen(read_end, "rb") as stream:
        lines = stream.read().splitlines()
    assert [json.loads(line) for line in lines] == [{"kind": "phase", "nodeid": "t::ä"}, {"kind": "end", "exit": 0}]


def test_the_writer_is_bound_before_the_tree_can_patch_it(monkeypatch: pytest.MonkeyPatch) -> None:
    read_end, write_end = os.pipe()
    send = recorder.pipe_writer(write_end)
    monkeypatch.setattr(json, "dumps", lambda *_a, **_k: '{"kind": "forged"}')
    monkeypatch.setattr(os, "write", lambda fd, data: len(data))
    send({"kind": "phase", "outcome": "failed"})
    os.close(write_end)
    with os.fdopen(read_end, "rb") as stream:
        assert json.loads(stream.read()) == {"kind": "phase", "outcome": "failed"}


def test_supervisor_seal_opens_with_the_host_reader() -> None:
    body = json.dumps({"format": supervisor.FORMAT, "run": None}).encode()
    assert open_seal(supervisor.seal(b"s" * 32, body), b"s" * 32)[0] == {"format": 1, "run": None}


def test_failing_ignores_expected_failures() -> None:
    records = [
        {"kind": "phase", "nodeid": "a", "outcome": "failed"},
        {"kind": "phase", "nodeid": "b", "outcome": "failed", "xfail": True},
        {"kind": "phase", "nodeid": "a", "when": "teardown", "outcome": "failed"},
        "not a record",
    ]
    assert supervisor.failing(records) == ["a"]


def test_tree_path_puts_the_tree_after_the_standard_library() -> None:
    path = session.tree_path("/ws", [".", "src", "."], "/ws/.verifier-x")
    assert path[-3:] == ["/ws", "/ws/src", "/ws/.verifier-x"]
    assert path[: len(path) - 3] == [entry for entry in sys.path if entry]


def test_export_agrees_with_coverage_pys_own_data(tmp_path: Path) -> None:
    """Outside check: the export's lines and arcs are coverage.py's own (CoverageData.lines / arcs)."""
    module = tmp_path / "pricing.py"
    module.write_text("def price(x):\n    if x:\n        return 1\n    return 2\n")
    script = (
        "import sys, coverage\n"
        f"cov = coverage.Coverage(data_file='data', branch=True, source=[{str(tmp_path)!r}])\n"
        "cov.start()\nsys.path.insert(0, '.')\nimport pricing\ncov.switch_context('t::one')\npricing.price(1)\n"
        "cov.stop()\ncov.save()\n"
    )
    subprocess.run([sys.executable, "-c", script], cwd=tmp_path, check=True)
    exported = supervisor.export_coverage((tmp_path / "data").read_bytes())
    data = coverage.CoverageData(basename=str(tmp_path / "data"))
    data.read()
    name = next(iter(data.measured_files()))
    entry = exported["files"][name]
    assert entry["lines"] == sorted(data.lines(name) or ())
    assert {tuple(arc) for arc in entry["arcs"]} == set(data.arcs(name) or ())
    labels = exported["contexts"]
    assert [labels[i] for i in entry["contexts"]["3"]] == ["t::one"]


def test_read_capped_refuses_links_and_large_files(tmp_path: Path) -> None:
    (tmp_path / "big").write_bytes(b"x" * 100)
    (tmp_path / "link").symlink_to(tmp_path / "big")
    assert supervisor.read_capped(str(tmp_path / "big"), cap=200) == b"x" * 100
    assert supervisor.read_capped(str(tmp_path / "big"), cap=50) is None
    assert supervisor.read_capped(str(tmp_path / "link")) is None


# -- whole runs ---------------------------------------------------------------------------------------------


def run_tree(
    tmp_path: Path, files: dict[str, str], judged: tuple[str, ...] = (), reruns: int = 2, workers: int = 1
) -> RunResult:
    """Run the harness on ``files`` in the sandbox the end-to-end tests use, and read it as the gate does."""
    tree = tmp_path / "tree"
    for name, text in files.items():
        (tree / name).parent.mkdir(parents=True, exist_ok=True)
        (tree / name).write_text(text)
    policy = Policy(source="test")
    policy = Policy(source="test", selection=type(policy.selection)(reruns=reruns, workers=workers))
    prepared = harness.prepare(tree, policy, Selection(whole_suite=True), judged)
    result = sandbox.choose(test_sandbox(), True).run(prepared.request)
    run = harness.HarnessRun(result, prepared.key, prepared.folder, prepared.analyses, judged, prepared.known)
    return harness.read_run(run)


def test_the_harness_folder_is_random_and_the_settings_leave_no_key(tmp_path: Path) -> None:
    tree = tmp_path / "tree"
    tree.mkdir()
    first = harness.prepare(tree, Policy(source="t"), Selection(whole_suite=True))
    second = harness.prepare(tree, Policy(source="t"), Selection(whole_suite=True))
    assert first.folder != second.folder and first.folder.startswith(".verifier-")
    settings = json.loads((tree / first.folder / "settings.json").read_text())
    assert settings["key"] == first.key.hex()  # handed over in the file the supervisor deletes first
    assert first.request.python_args[0] == "-I"


def test_a_run_of_a_real_tree(tmp_path: Path) -> None:
    files = {
        "calc/__init__.py": "",
        "calc/ops.py": "def half(x):\n    if x % 2:\n        raise ValueError(x)\n    return x // 2\n",
        "tests/test_ops.py": "from calc.ops import half\n\n\ndef test_half():\n    assert half(4) == 2\n",
    }
    run = run_tree(tmp_path, files, judged=("calc/ops.py",))
    assert (run.status, run.pytest_exit, run.problems) == ("completed", 0, ())
    ops = run.coverage["calc/ops.py"]
    # coverage.py's statements of ops.py are lines 1-4 (def, if, raise, return); the raise never ran
    assert (sorted(ops.executed), sorted(ops.missing)) == ([1, 2, 4], [3])
    assert dict(ops.missing_branches) == {2: (3,)}
    assert ops.contexts[4] == ("tests/test_ops.py::test_half",)


def test_the_re_run_looks_like_the_first_run(tmp_path: Path) -> None:
    """What the code under test can see (environment, arguments, sys.path, coverage running) is the same
    in the run and the re-run: the probe keeps the first run's view in the sandbox's temp folder and
    fails; on the re-run it passes only if it sees the same (so the test is flaky, not failing)."""
    probe = (
        "import json, os, sys, tempfile\nimport coverage\n\n\ndef test_probe():\n"
        "    facts = {'env': dict(os.environ), 'argv': sys.argv, 'path': sys.path,\n"
        "             'measured': coverage.Coverage.current() is not None}\n"
        "    mark = os.path.join(tempfile.gettempdir(), 'probe-facts.json')\n"
        "    if not os.path.exists(mark):\n"
        "        with open(mark, 'w') as out:\n"
        "            json.dump(facts, out)\n"
        "        raise AssertionError('first run')\n"
        "    with open(mark) as seen:\n"
        "        assert json.load(seen) == facts\n"
    )
    run = run_tree(tmp_path, {"tests/test_probe.py": probe}, reruns=1)
    assert [(t.outcome, t.attempts) for t in run.tests] == [("flaky", 2)], run.output_tail[-3000:]


def test_the_supervisor_cannot_be_inspected_by_the_tests(tmp_path: Path) -> None:
    """prctl(PR_SET_DUMPABLE, 0) (proc(5): /proc/<pid>/environ and fd/ need ptrace access, which a
    non-dumpable process denies to processes of the same user without CAP_SYS_PTRACE)."""
    if test_sandbox() == "process" and os.geteuid() == 0:
        pytest.skip("root on the host may inspect any process; the namespace sandbox drops that right")
    probe = (
        "import os\nimport pytest\n\n\ndef test_supervisor_is_closed():\n"
        "    supervisor = os.getppid()\n"
        "    with pytest.raises(PermissionError):\n"
        "        open(f'/proc/{supervisor}/environ').read()\n"
        "    with pytest.raises(PermissionError):\n"
        "        os.listdir(f'/proc/{supervisor}/fd')\n"
    )
    run = run_tree(tmp_path, {"tests/test_probe.py": probe})
    assert [(t.node_id, t.outcome) for t in run.tests] == [("tests/test_probe.py::test_supervisor_is_closed", "passed")]


def test_tree_modules_named_like_the_tools_do_not_replace_them(tmp_path: Path) -> None:
    broken = "raise SystemExit('the tree shadowed the harness')\n"
    files = {
        "json.py": broken,
        "subprocess.py": broken,
        "pytest.py": broken,
        "coverage/__init__.py": broken,
        "tests/test_ok.py": "def test_ok():\n    assert True\n",
    }
    run = run_tree(tmp_path, files)
    assert (run.status, [t.outcome for t in run.tests]) == ("completed", ["passed"]), run.output_tail


def test_a_spread_run_over_workers(tmp_path: Path) -> None:
    """pytest-xdist's workers start isolated too, measure coverage (coverage.py's patch = subprocess) and
    report through the controller; the collected count comes from the workers' collection."""
    tests = "".join(
        f"def test_{n}():\n    from calc.ops import half\n    assert half({2 * n}) == {n}\n\n\n" for n in range(6)
    )
    files = {
        "calc/__init__.py": "",
        "calc/ops.py": "def half(x):\n    return x // 2\n",
        "tests/test_ops.py": tests,
        "json.py": "raise SystemExit('the tree shadowed json in a worker')\n",
    }
    run = run_tree(tmp_path, files, judged=("calc/ops.py",), workers=2)
    assert (run.status, run.problems, len(run.tests)) == ("completed", (), 6), run.output_tail[-3000:]
    assert "gw0" in run.output_tail or "2 workers" in run.output_tail
    assert set(run.coverage["calc/ops.py"].contexts[2]) == {f"tests/test_ops.py::test_{n}" for n in range(6)}


def test_a_whole_suite_run_without_a_count_spreads_by_the_tests_in_the_source(tmp_path: Path) -> None:
    """No map yet (a first check builds it with the whole suite): the test functions counted in the source
    decide the workers, and the spread run's per-test coverage is as complete as a single process's."""
    tests = "".join(
        f"def test_{n}():\n    from calc.ops import half\n    assert half({2 * n}) == {n}\n\n\n" for n in range(60)
    )
    files = {"calc/__init__.py": "", "calc/ops.py": "def half(x):\n    return x // 2\n", "tests/test_ops.py": tests}
    assert harness.estimated_tests(Path("."), frozenset()) == 0
    run = run_tree(tmp_path, files, judged=("calc/ops.py",), workers=0)
    assert harness.estimated_tests(tmp_path / "tree", frozenset({"tests/test_ops.py", "calc/ops.py"})) == 60
    assert (run.status, run.problems, len(run.tests)) == ("completed", (), 60), run.output_tail[-3000:]
    if (os.cpu_count() or 1) >= 2:
        assert "gw0" in run.output_tail or "2 workers" in run.output_tail
    assert set(run.coverage["calc/ops.py"].contexts[2]) == {f"tests/test_ops.py::test_{n}" for n in range(60)}


def test_a_judged_file_coverage_cannot_see_is_not_verified(tmp_path: Path) -> None:
    """coverage.py does not look for files whose names it cannot import (a comma, coverage.py's
    find_python_files): a judged file missing from its data is a problem, never covered."""
    files = {"calc/__init__.py": "", "calc/odd,name.py": "VALUE = 1\n", "tests/test_x.py": "def test_x():\n    pass\n"}
    run = run_tree(tmp_path, files, judged=("calc/odd,name.py",))
    assert run.status == "harness-error"
    assert run.problems == ("calc/odd,name.py: the coverage data has no record of this judged file",)


def test_a_detached_process_holding_the_channel_makes_the_run_unverifiable(tmp_path: Path) -> None:
    """A forked child keeps the session's descriptors (fork copies them, close-on-exec or not); one that
    leaves the session's process group survives its kill and could write records later."""
    daemon = (
        "import os, time\n\n\ndef test_leaves_a_daemon():\n"
        "    if os.fork() == 0:\n        os.setsid()\n        time.sleep(30)\n        os._exit(0)\n"
    )
    run = run_tree(tmp_path, {"tests/test_daemon.py": daemon})
    assert run.status == "harness-error"
    assert "a process left behind by the tests held the results channel open" in run.problems


def sealed_run(tmp_path: Path, body: dict, judged: tuple[str, ...] = ("pk/m.py",)) -> RunResult:
    """Read a sealed body made here (sealed with the supervisor's own function) as the gate reads a run."""
    tree = tmp_path / "tree"
    (tree / "pk").mkdir(parents=True)
    (tree / "pk" / "m.py").write_text("def f():\n    return 1\n")
    prepared = harness.prepare(tree, Policy(source="t"), Selection(whole_suite=True), judged)
    files = {f"{prepared.folder}/{harness.SEALED}": supervisor.seal(prepared.key, json.dumps(body).encode())}
    result = SandboxResult("test", "none", 0, None, False, "", False, files, 1.0)
    return harness.read_run(
        harness.HarnessRun(result, prepared.key, prepared.folder, prepared.analyses, judged, prepared.known)
    )


def a_session(node: str = "tests/test_m.py::test_f") -> dict:
    phases = [{"kind": "phase", "nodeid": node, "when": w, "outcome": "passed"} for w in ("setup", "call", "teardown")]
    records = [
        {"kind": "collected", "count": 1},
        *phases,
        {"kind": "finish", "exitstatus": 0},
        {"kind": "end", "exit": 0},
    ]
    return {"returncode": 0, "records": records}


def test_coverage_of_files_the_tree_does_not_have_is_dropped(tmp_path: Path) -> None:
    entry = {"lines": [1, 2], "arcs": [[-1, 2], [2, -1]], "contexts": {}}
    coverage_export = {"contexts": [], "files": {"pk/m.py": entry, "pk/written_at_run_time.py": entry}}
    run = sealed_run(tmp_path, {"format": 1, "run": a_session(), "coverage": coverage_export, "reruns": []})
    assert (run.status, run.problems) == ("completed", ())
    assert set(run.coverage) == {"pk/m.py"} and sorted(run.coverage["pk/m.py"].executed) == [1, 2]


def test_a_judged_file_missing_from_the_export_is_a_problem(tmp_path: Path) -> None:
    run = sealed_run(tmp_path, {"format": 1, "run": a_session(), "coverage": {"contexts": [], "files": {}}})
    assert run.status == "harness-error"
    assert run.problems == ("pk/m.py: the coverage data has no record of this judged file",)


def test_no_coverage_export_is_a_problem(tmp_path: Path) -> None:
    body = {"format": 1, "run": a_session(), "coverage": None, "coverage_problem": "coverage data file changed"}
    run = sealed_run(tmp_path, body)
    assert (run.status, run.problems) == ("harness-error", ("no coverage data: coverage data file changed",))
