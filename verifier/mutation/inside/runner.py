"""The mutant runner that runs inside the sandbox (standard library and pytest only: the verifier package
is not importable there). It is copied into the workspace as a file and started as a script.

``runner.py PLAN`` collects the tests once in one pytest session, then, instead of running them, tries
the mutants: for each one it forks a child, which swaps the mutated function's code object (compiled from
the mutated text of the top-level statement that holds it, or of the whole file, found by its qualified
name) and runs only that mutant's tests, stopping at the first failure; the child reports the outcome
only, so a failure is not formatted there. A mutant at module level (or one whose function cannot be
swapped) runs in a fresh interpreter instead (``runner.py --fresh PLAN ID FD``), which imports the mutated
file's text through an import hook. Nothing of a mutant is written anywhere: its text lives in memory only.

A small pool of children runs at once; each has a time limit (the plan gives it) and is killed with its
process group when it overruns. Every outcome is one JSON line in the results file, written once at the end
in place of whatever the tests may have put at that path, after which the process ends without running
exit handlers. The tests run in this process's children and decide their own outcome: a test written to
detect a mutant and fail on purpose is not something a runner can see (the static rules on tests are).
"""

from __future__ import annotations

import ast
import contextlib
import gc
import importlib.abc
import importlib.machinery
import json
import os
import select
import signal
import subprocess
import sys
import time
import types
from typing import Any

import pytest

RESULT_CAP = 4096  # bytes a child may report


def main(argv: list[str]) -> int:
    """``runner.py PLAN`` (ends the process itself) or ``runner.py --fresh PLAN ID FD``."""
    if len(argv) >= 4 and argv[0] == "--fresh":
        return fresh(_load(argv[1]), argv[2], int(argv[3]))
    plan = _load(argv[0])
    files = sorted({test.split("::", 1)[0] for m in plan["mutants"] for test in m["tests"]})
    server = MutantServer(plan, os.path.abspath(argv[0]))
    args = [*plan.get("pytest_args", []), "-p", "no:cacheprovider", "-q", "--rootdir=.", *files]
    with open(os.devnull, "w") as quiet:
        stdout = sys.stdout
        sys.stdout = quiet
        try:
            pytest.main(args, plugins=[server])
        finally:
            sys.stdout = stdout
    server.finish()
    os._exit(0)  # no exit handlers: code the tests registered must not run after the results are written


def _load(path: str) -> dict[str, Any]:
    with open(path, encoding="utf-8") as handle:
        plan: dict[str, Any] = json.load(handle)
    return plan


def mutated_source(mutant: dict[str, Any]) -> str | None:
    """The file's text with the mutant applied, or None when the file no longer holds ``original`` there."""
    with open(mutant["path"], encoding="utf-8", newline="") as handle:
        rows = handle.read().split("\n")
    start, end = mutant["line"], mutant["end_line"]
    if "\n".join(rows[start - 1 : end]) != mutant["original"]:
        return None
    return "\n".join([*rows[: start - 1], mutant["mutated"], *rows[end:]])


class MutantServer:
    """A pytest plugin: after collection, tries the mutants in forked children instead of running the tests."""

    def __init__(self, plan: dict[str, Any], plan_path: str) -> None:
        self.plan = plan
        self.plan_path = plan_path
        self.items: dict[str, Any] = {}
        self.records: list[str] = []
        self.reported: set[str] = set()

    def pytest_collection_modifyitems(self, session: Any, config: Any, items: list[Any]) -> None:
        self.items = {item.nodeid: item for item in items}

    @pytest.hookimpl(tryfirst=True)
    def pytest_runtestloop(self, session: Any) -> bool:
        # Objects that exist now move to a generation the collector never visits: a forked child's collections
        # then do not write to (and so copy) the parent's pages (Python's gc.freeze documentation).
        gc.freeze()
        pool = Pool(int(self.plan.get("workers") or os.cpu_count() or 1))
        deadline = time.monotonic() + float(self.plan.get("budget", 3600))
        for mutant in self.plan["mutants"]:
            if time.monotonic() > deadline:
                self.report(mutant["id"], "error", problem="the mutation stage's time budget ran out")
                continue
            pool.add(mutant, self.start(mutant))
            for finished in pool.wait(until_free=True):
                self.report(*finished)
        for finished in pool.wait(until_free=False):
            self.report(*finished)
        return True

    def start(self, mutant: dict[str, Any]) -> Child | tuple[str, str]:
        """A running child for ``mutant``, or (status, problem) when it cannot be tried."""
        items = [self.items[test] for test in mutant["tests"] if test in self.items]
        if not items:
            return ("error", "none of the tests that executed the line was collected again")
        source = mutated_source(mutant)
        if source is None:
            return ("error", "the file does not hold the mutant's original text")
        swap = None if mutant.get("scope") is None else find_swap(mutant, source)
        if swap is None:
            return spawn_fresh(self.plan_path, mutant)
        for item in items:
            _ = item.location  # worked out once here, not again in every child (a cached property of the item)
        return fork_child(mutant, items, swap)

    def report(
        self,
        mutant_id: str,
        status: str,
        killed_by: str | None = None,
        problem: str | None = None,
        how: str | None = None,
        seconds: float = 0.0,
    ) -> None:
        if mutant_id in self.reported:
            return
        self.reported.add(mutant_id)
        record: dict[str, Any] = {"id": mutant_id, "status": status, "killed_by": killed_by, "problem": problem}
        record |= {"how": how, "seconds": round(seconds, 4)}
        self.records.append(json.dumps(record) + "\n")

    def finish(self) -> None:
        """Write every record at once, replacing whatever is at the results path (the tests can write
        files too: a line they wrote earlier is gone, and the host reads only the first record of an id)."""
        for mutant in self.plan["mutants"]:
            self.report(mutant["id"], "error", problem="the runner ended before trying it")
        target = self.plan["results"]
        temporary = f"{target}.{os.getpid()}.tmp"
        with open(temporary, "w", encoding="utf-8") as out:
            out.writelines(self.records)
        os.replace(temporary, target)


# -- swapping a function's code ----------------------------------------------------------------------------------


def find_swap(mutant: dict[str, Any], source: str) -> tuple[types.FunctionType, types.CodeType] | None:
    """The live function of the mutant's scope and its mutated code, or None (then a fresh run is used)."""
    path = os.path.realpath(mutant["path"])
    module = _module_of(path)
    if module is None:
        return None
    target: Any = module
    for part in mutant["scope"].split("."):
        target = getattr(target, part, None)
        if target is None:
            return None
    function = _unwrap(target, mutant["scope"], path)
    if function is None:
        return None
    filename = module.__file__ or path
    try:
        new = statement_code(mutant, source, filename, function)
        if new is None:
            new = _code_named(compile(source, filename, "exec", dont_inherit=True), mutant["scope"])
    except (SyntaxError, ValueError):
        return None
    if new is None or new.co_freevars != function.__code__.co_freevars:
        return None
    return function, new


class Layout:
    """What of a file (as it is on disk) the compile of one of its statements needs: its rows, the lines of
    each top-level statement (decorators included), and its module-level imports, each rewritten on one line
    (the compiler emits other code for an attribute of an imported name)."""

    def __init__(self, text: str) -> None:
        tree = ast.parse(text)
        self.rows = text.split("\n")
        self.spans = [
            (min([n.lineno, *(d.lineno for d in getattr(n, "decorator_list", []))]), n.end_lineno or n.lineno)
            for n in tree.body
        ]
        imports: dict[int, list[str]] = {}
        pending: list[ast.AST] = list(tree.body)
        while pending:
            node = pending.pop()
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                imports.setdefault(node.lineno, []).append(ast.unparse(node))
            elif isinstance(node, ast.stmt) and not isinstance(
                node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)
            ):
                pending.extend(
                    child for child in ast.iter_child_nodes(node) if isinstance(child, (ast.stmt, ast.excepthandler))
                )
            elif isinstance(node, ast.ExceptHandler):
                pending.extend(node.body)
        self.imports = {line: "; ".join(reversed(found)) for line, found in imports.items()}

    def statement_text(self, rows: list[str], span: tuple[int, int], grown: int) -> str:
        """``rows`` (the file's, or the mutated file's with ``grown`` more rows inside ``span``) with only the
        statement of ``span`` and the imports outside it kept, every other row blank: line numbers stay."""
        first, last = span
        text = [""] * len(rows)
        for line, imports in self.imports.items():
            if not first <= line <= last:
                text[(line if line < first else line + grown) - 1] = imports
        text[first - 1 : last + grown] = rows[first - 1 : last + grown]
        return "\n".join(text)


_LAYOUTS: dict[str, Layout | None] = {}
_FAITHFUL: dict[tuple[str, tuple[int, int], str], bool] = {}  # (path, statement, scope) -> its compile alone is exact


def statement_code(
    mutant: dict[str, Any], source: str, filename: str, function: types.FunctionType
) -> types.CodeType | None:
    """The mutated code of the mutant's scope from a compile of the one top-level statement that holds it
    (and the file's imports), not of the whole file: a fraction of the time, and the parent compiles once
    per mutant while the children wait on it. Only where the statement compiled alone from the file on disk
    gives exactly the live function's code object (CPython compares bytecode, constants, names, line table);
    None otherwise, and then the whole file is compiled."""
    path, scope = mutant["path"], mutant["scope"]
    if path not in _LAYOUTS:
        try:
            with open(path, encoding="utf-8", newline="") as handle:
                _LAYOUTS[path] = Layout(handle.read())
        except (OSError, SyntaxError, ValueError):
            _LAYOUTS[path] = None
    layout = _LAYOUTS[path]
    span = (
        next((s for s in layout.spans if s[0] <= mutant["line"] and mutant["end_line"] <= s[1]), None)
        if layout
        else None
    )
    if layout is None or span is None:
        return None
    key = (path, span, scope)
    if key not in _FAITHFUL:
        alone = compile(layout.statement_text(layout.rows, span, 0), filename, "exec", dont_inherit=True)
        _FAITHFUL[key] = _code_named(alone, scope) == function.__code__
    if not _FAITHFUL[key]:
        return None
    grown = mutant["mutated"].count("\n") - (mutant["end_line"] - mutant["line"])
    text = layout.statement_text(source.split("\n"), span, grown)
    return _code_named(compile(text, filename, "exec", dont_inherit=True), scope)


_MODULES: dict[str, Any] = {}  # real path of a module's file -> the module (built after the collection)


def _module_of(path: str) -> Any:
    """The imported module whose file is ``path``; the index of sys.modules is made once (a lookup per
    mutant would resolve every module's path again)."""
    if path not in _MODULES:
        _MODULES.clear()
        for module in list(sys.modules.values()):
            file = _file_of(module)
            if file is not None:
                _MODULES.setdefault(file, module)
        _MODULES.setdefault(path, None)  # not imported: remembered too
    return _MODULES[path]


def _file_of(module: Any) -> str | None:
    try:
        name = getattr(module, "__file__", None)
        return os.path.realpath(name) if isinstance(name, str) else None
    except Exception:
        return None


def _code_named(code: types.CodeType, qualname: str) -> types.CodeType | None:
    for constant in code.co_consts:
        if isinstance(constant, types.CodeType):
            if getattr(constant, "co_qualname", constant.co_name) == qualname:
                return constant
            found = _code_named(constant, qualname)
            if found is not None:
                return found
    return None


def _unwrap(value: Any, qualname: str, path: str) -> types.FunctionType | None:
    """The plain function behind decorators, properties, static and class methods."""
    seen = 0
    pending = [value]
    while pending and seen < 20:
        seen += 1
        current = pending.pop()
        if isinstance(current, types.FunctionType):
            code = current.__code__
            if os.path.realpath(code.co_filename) == path and getattr(code, "co_qualname", code.co_name) == qualname:
                return current
        for name in ("__wrapped__", "__func__", "fget", "fset", "fdel"):
            inner = getattr(current, name, None)
            if inner is not None:
                pending.append(inner)
    return None


# -- children ----------------------------------------------------------------------------------------------------


class Child:
    """A running try of one mutant: its process, the pipe it reports through, its deadline."""

    def __init__(self, mutant: dict[str, Any], pid: int, reader: int, popen: subprocess.Popen[bytes] | None) -> None:
        self.mutant = mutant
        self.pid = pid
        self.reader = reader
        self.popen = popen
        self.started = time.monotonic()
        self.deadline = self.started + float(mutant["limit"])
        self.data = b""


def fork_child(mutant: dict[str, Any], items: list[Any], swap: tuple[types.FunctionType, types.CodeType]) -> Child:
    reader, writer = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: never returns
        try:
            os.close(reader)
            os.setpgid(0, 0)
            _quiet_fds()
            function, code = swap
            function.__code__ = code
            try:
                result = run_items(items)
            except Exception as error:  # pytest's protocol catches the tests' errors: this one is ours
                result = {"status": "error", "problem": f"the runner failed: {error!r}"[:500]}
            _send(writer, result)
        finally:
            os._exit(0)
    os.close(writer)
    return Child(mutant, pid, reader, None)


def run_items(items: list[Any]) -> dict[str, Any]:
    """Run ``items`` in this process (pytest's own per-test protocol), stopping at the first failure.
    A failed subtest counts: pytest reports it through the log hook only (a unittest case whose subtest
    failed has a passing call report of its own), so a watcher listens there too."""
    from _pytest.runner import runtestprotocol

    watcher = FirstFailure()
    if items:
        items[0].config.pluginmanager.register(watcher, "verifier-mutant-watcher")
    for index, item in enumerate(items):
        _plain_failures(item)
        nextitem = items[index + 1] if index + 1 < len(items) else None
        reports = runtestprotocol(item, nextitem=nextitem, log=False)
        if watcher.failed or any(report.failed for report in reports):
            return {"status": "killed", "killed_by": item.nodeid}
    return {"status": "survived"}


def _plain_failures(item: Any) -> None:
    """Make a failure of ``item`` cheap to report in this child. pytest settles a report's outcome from the
    exception before it formats the failure (``TestReport.from_item_and_call``), and a child sends only the
    outcome; the formatting (the source of every frame looked up and parsed) was most of a killed mutant's
    time. The item is the child's copy: the parent's stays as it was."""

    def failure_line(excinfo: Any, *_args: Any, **_kwargs: Any) -> str:
        return f"failed: {getattr(excinfo, 'typename', 'error')}"

    item.repr_failure = failure_line
    item._repr_failure_py = failure_line


def spawn_fresh(plan_path: str, mutant: dict[str, Any]) -> Child:
    reader, writer = os.pipe()
    popen = subprocess.Popen(
        [sys.executable, os.path.abspath(__file__), "--fresh", plan_path, mutant["id"], str(writer)],
        pass_fds=(writer,),
        stdin=subprocess.DEVNULL,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,
    )
    os.close(writer)
    return Child(mutant, popen.pid, reader, popen)


def fresh(plan: dict[str, Any], mutant_id: str, writer: int) -> int:
    """In a new interpreter: import the mutated file through a hook and run the mutant's tests with -x."""
    mutant = next(m for m in plan["mutants"] if m["id"] == mutant_id)
    source = mutated_source(mutant)
    if source is None:
        _send(writer, {"status": "error", "problem": "the file does not hold the mutant's original text"})
        return 0
    sys.meta_path.insert(0, MutatedFinder(mutant["path"], source))
    recorder = FirstFailure()
    code = pytest.main(
        [*plan.get("pytest_args", []), "-p", "no:cacheprovider", "-q", "-x", "--rootdir=.", *mutant["tests"]],
        plugins=[recorder],
    )
    if code in (0, 1, 2) or recorder.failed:
        status = "survived" if code == 0 and not recorder.failed else "killed"
        _send(writer, {"status": status, "killed_by": recorder.failed})
    else:
        _send(writer, {"status": "error", "problem": f"pytest ended with exit status {int(code)}"})
    return 0


class FirstFailure:
    """A pytest plugin remembering the first test that failed (or errored)."""

    def __init__(self) -> None:
        self.failed: str | None = None

    def pytest_runtest_logreport(self, report: Any) -> None:
        if report.failed and self.failed is None:
            self.failed = report.nodeid


class MutatedFinder(importlib.abc.MetaPathFinder):
    """Imports the module whose file is ``path`` from ``source`` (the mutated text) instead of the disk."""

    def __init__(self, path: str, source: str) -> None:
        self.path = os.path.realpath(path)
        self.source = source

    def find_spec(self, fullname: str, path: Any, target: Any = None) -> Any:
        spec = importlib.machinery.PathFinder.find_spec(fullname, path)
        if spec is None or not spec.origin or os.path.realpath(spec.origin) != self.path:
            return None
        spec.loader = MutatedLoader(fullname, spec.origin, self.source)
        return spec


class MutatedLoader(importlib.machinery.SourceFileLoader):
    def __init__(self, fullname: str, path: str, source: str) -> None:
        super().__init__(fullname, path)
        self.source = source

    def get_code(self, fullname: str) -> types.CodeType:
        return compile(self.source, self.path, "exec", dont_inherit=True)


Finished = tuple[str, str, Any, Any, Any, float]  # id, status, killed_by, problem, how (fork | fresh), seconds


class Pool:
    """The children running at once; finished ones are reaped and judged."""

    def __init__(self, size: int) -> None:
        self.size = max(1, size)
        self.running: list[Child] = []
        self.done: list[Finished] = []

    def add(self, mutant: dict[str, Any], started: Child | tuple[str, str]) -> None:
        if isinstance(started, Child):
            self.running.append(started)
        else:
            self.done.append((mutant["id"], started[0], None, started[1], None, 0.0))

    def wait(self, until_free: bool) -> list[Finished]:
        while self.running and (len(self.running) >= self.size or not until_free):
            self._step()
        finished, self.done = self.done, []
        return finished

    def _step(self) -> None:
        now = time.monotonic()
        timeout = max(0.0, min(child.deadline for child in self.running) - now)
        readable, _, _ = select.select([child.reader for child in self.running], [], [], min(timeout, 1.0))
        for child in list(self.running):
            if child.reader in readable:
                chunk = os.read(child.reader, 65536)
                if chunk:
                    child.data += chunk
                    continue
                self._finish(child, timed_out=False)
            elif time.monotonic() > child.deadline:
                self._finish(child, timed_out=True)

    def _finish(self, child: Child, timed_out: bool) -> None:
        self.running.remove(child)
        os.close(child.reader)
        if timed_out:
            _kill_group(child.pid)
        status = _reap(child)
        mutant_id, how = child.mutant["id"], "fork" if child.popen is None else "fresh"
        seconds = time.monotonic() - child.started
        if timed_out:
            self.done.append((mutant_id, "timeout", None, None, how, seconds))
            return
        with contextlib.suppress(OSError):
            os.killpg(child.pid, signal.SIGKILL)  # whatever the tests left running in its group
        try:
            result = json.loads(child.data[:RESULT_CAP].decode("utf-8"))
        except ValueError:
            result = None
        if not isinstance(result, dict) or "status" not in result:
            ended = f"the interpreter ended ({status}) without a result"
            self.done.append((mutant_id, "crashed", None, ended, how, seconds))
            return
        found = (str(result["status"]), result.get("killed_by"), result.get("problem"))
        self.done.append((mutant_id, *found, how, seconds))


def _reap(child: Child) -> str:
    if child.popen is not None:
        code = child.popen.wait()
        return f"exit status {code}" if code >= 0 else f"signal {-code}"
    _pid, status = os.waitpid(child.pid, 0)
    if os.WIFSIGNALED(status):
        return f"signal {os.WTERMSIG(status)}"
    return f"exit status {os.WEXITSTATUS(status)}"


def _kill_group(pid: int) -> None:
    for kill in (os.killpg, os.kill):  # the group, and the child itself if it had no time to make its group
        with contextlib.suppress(OSError):
            kill(pid, signal.SIGKILL)


def _quiet_fds() -> None:
    """The child's output goes nowhere: the sandbox's capped output stays the runner's own."""
    null = os.open(os.devnull, os.O_RDWR)
    for fd in (0, 1, 2):
        os.dup2(null, fd)
    os.close(null)


def _send(writer: int, result: dict[str, Any]) -> None:
    data = json.dumps(result).encode("utf-8")[:RESULT_CAP]
    try:
        os.write(writer, data)
    finally:
        os.close(writer)


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
