"""Rules on the means of tampering with the test run, and on machine-written code the other rules cannot read.

Code that runs in the same process as pytest can always reach into it: rewrite what the harness records,
replace coverage's tracer, end the session early with a success code. No results channel alone makes that
impossible, so machine-written code (tests included) that *uses the means* is a finding in itself:

- ``tamper.means``: imports of pytest's, pluggy's or coverage's internals; writes to ``sys.modules``; reaching
  other objects through ``gc``, frames (``inspect``, ``sys._getframe``) or ``ctypes``; replacing the tracer
  (``sys.settrace``, ``sys.monitoring``); exit handlers; ending the process or the session early
  (``os._exit``, ``pytest.exit``, ``os.kill``, signals); test plugins declared from a module
  (``pytest_plugins``); pytest or coverage settings set through the environment; writes under the harness's
  folder or to coverage data files.
- ``tamper.hidden-code``: machine-written code outside Python source: compiled or native files (``.pyc``,
  ``.so``, ...) added or changed, and code run through ``runpy`` or an import loader from a file.

Each reported line is machine-written; the finding says what the means can do. A human can approve a
legitimate use with a waiver on its path.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator

from verifier.astnames import PIECES, ModuleIndex, canonical, constant_string, module_index, resolve, span
from verifier.models import Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import glob_matcher, machine_lines, machine_may_have_touched, option

MEANS = "tamper.means"
HIDDEN = "tamper.hidden-code"

# Module prefixes that are a tool's internals (the public APIs are ``pytest`` and ``coverage``'s top level,
# pytest documentation, "API Reference"; coverage.py documentation, "Coverage.py API").
_INTERNAL_IMPORTS = {
    "_pytest": "imports pytest's internals (it can rewrite how tests are run and reported)",
    "pluggy": "imports pytest's plugin manager (it can add or replace hooks of the running session)",
    "coverage": "imports coverage.py (it can reach the running measurement and its data)",
    "xdist": "imports pytest-xdist's internals",
    "pytest_cov": "imports the pytest coverage plugin's internals",
}
# dotted call -> what it can do to the run. Python docs (os, sys, gc, inspect, atexit, signal, ctypes)
# and pytest documentation (pytest.exit) describe each; the reading of them as means of tampering is ours.
_CALLS = {
    "os._exit": "ends the process at once, skipping the harness's handlers (the run can look complete)",
    "os.abort": "ends the process at once",
    "signal.raise_signal": "sends a signal to its own process",
    "signal.pthread_kill": "sends a signal to a thread of its own process",
    "signal.alarm": "schedules a signal to its own process",
    "pytest.exit": "ends the pytest session early, with an exit code of its choosing",
    "atexit.register": "registers an exit handler, which runs after the tests (when the results are written)",
    "sys.settrace": "replaces the trace function (coverage.py's measurement)",
    "sys.setprofile": "replaces the profile function of the test process",
    "threading.settrace": "replaces the trace function of new threads (coverage.py's measurement)",
    "gc.get_objects": "reaches every object of the process (the harness's and pytest's included)",
    "gc.get_referrers": "reaches objects of the process by reference (the harness's and pytest's included)",
    "gc.get_referents": "reaches objects of the process by reference",
    "sys._getframe": "reaches the frames of its callers (pytest's and the harness's)",
    "inspect.currentframe": "reaches the frames of its callers (pytest's and the harness's)",
    "inspect.stack": "reaches the frames of its callers (pytest's and the harness's)",
    "inspect.getouterframes": "reaches the frames of its callers (pytest's and the harness's)",
    "sys.addaudithook": "installs an audit hook in the test process",
}
_PREFIX_CALLS = {
    "sys.monitoring.": "uses sys.monitoring, which coverage.py's measurement also uses",
    "ctypes.": "uses ctypes, which can rewrite any memory of the process",
}
# only in test files: ordinary in a program's entry point, a way out of the session in a test
_TEST_ONLY_CALLS = {
    "sys.exit": "ends the test process",
    "exit": "ends the test process",
    "quit": "ends the test process",
    "os.exec": "replaces the test process by another program",  # the os.exec* family
    "os.kill": "sends a signal from a test",
    "os.killpg": "sends a signal to a process group from a test",
    "signal.signal": "installs a signal handler in the test process",
}
# a signal to these ends the run itself, wherever the call is: its own process, its parent (the runner),
# its group, every process (os.kill's pid 0 and -1, Python docs, os.kill / kill(2))
_OWN_PROCESS = frozenset({"os.getpid", "os.getppid", "os.getpgrp", "os.getpgid"})
_SIGNAL_SENDERS = ("os.kill", "os.killpg")
_FRAME_ATTRIBUTES = frozenset({"f_back", "f_globals", "f_locals", "f_builtins", "tb_frame", "gi_frame", "cr_frame"})
_SYS_MODULES_WRITES = frozenset({"pop", "popitem", "update", "setdefault", "clear", "__setitem__", "__delitem__"})
# coverage.py's default data file is .coverage, its parallel files .coverage.<suffix> (coverage.py docs, data file)
_ENVIRONMENT_PREFIXES = ("PYTEST_", "COVERAGE_", "COV_CORE_", "PYTHONPATH", "PYTHONSTARTUP", "PYTHONHOME")

# Loaders that run code from a file that need not be Python source (Python docs: runpy, importlib).
_LOADER_CALLS = {
    "runpy.run_path": "runs the code of a file or folder",
    "runpy.run_module": "runs a module found by name",
    "importlib.machinery.SourceFileLoader": "loads a module from a file of any name",
    "importlib.machinery.SourcelessFileLoader": "loads compiled code (.pyc)",
    "importlib.machinery.ExtensionFileLoader": "loads a native extension",
    "importlib.util.spec_from_file_location": "imports a module from a file of any name",
    "importlib.util.spec_from_loader": "imports a module through a loader of its own",
    "importlib.util.module_from_spec": "builds a module from a loader's spec",
    "zipimport.zipimporter": "imports code from an archive",
    "imp.load_source": "loads a module from a file of any name",
    "imp.load_compiled": "loads compiled code (.pyc)",
    "types.CodeType": "builds code objects directly",
    "marshal.loads": "reads compiled code objects",
}
# Files that hold code the static rules cannot read: compiled Python, native extensions, archives on sys.path.
HIDDEN_SUFFIXES = (".pyc", ".pyo", ".so", ".pyd", ".dll", ".dylib", ".egg", ".whl", ".pyz")

_SOURCES = (
    "Python docs: os (_exit, kill, abort, exec*), sys (modules, settrace, _getframe, monitoring), gc, inspect",
    "Python docs: atexit, signal, ctypes, runpy, importlib (machinery, util), zipimport, marshal",
    "pytest documentation: pytest.exit; Requiring/Loading plugins in a test module or conftest file",
    "coverage.py documentation: Coverage.py API; data file",
)


@rule(
    MEANS,
    default="block",
    summary="machine-written code that can tamper with the test run",
    stage="static",
    sources=_SOURCES,
)
def tampering_means(context: RuleContext) -> Iterator[Finding]:
    """Machine-written code, tests included, must not use the means by which code in the test process can
    forge what the gate measures: imports of ``_pytest``, ``pluggy``, ``coverage`` (any part), ``xdist``,
    ``pytest_cov``; writes to ``sys.modules`` (assignment, deletion, ``pop``, ``update``, ...); ``gc`` reaching
    other objects, frames (``sys._getframe``, ``inspect.currentframe``/``stack``, ``f_back``, ``f_globals``),
    ``ctypes``; ``sys.settrace``, ``sys.setprofile``, ``threading.settrace``, ``sys.monitoring``;
    ``atexit.register``; ending the process or session early (``os._exit``, ``os.abort``, ``os.kill``,
    ``os.killpg``, ``signal.raise_signal``, ``signal.signal``, ``pytest.exit``, ``raise KeyboardInterrupt``;
    in test files also ``sys.exit``, ``raise SystemExit`` and the ``os.exec*`` family); ``pytest_plugins``
    declared in a module; ``PYTEST_*``, ``COVERAGE_*``, ``PYTHONPATH`` set in ``os.environ``; a path under
    the harness's folder or a coverage data file (``.coverage``) written in the source. Remove it; if the
    use is legitimate, a person approves it with a waiver on its path."""
    is_test = glob_matcher(tuple(option(context, "tests.weakened", "test_paths")))
    harness_dir = _harness_dir()
    for path, lines in context.provenance.machine_lines.items():
        source = context.head_sources.get(path)
        if not path.endswith(".py") or source is None or not _may_hold(source, (*_MEANS_TEXTS, harness_dir)):
            continue
        index = module_index(source, path)
        if index is not None:
            finder = _MeansFinder(index, path, frozenset(lines), is_test(path), harness_dir)
            yield from finder.findings()


@rule(
    HIDDEN,
    default="block",
    summary="machine-written code outside Python source (.pyc, native files, code run by a loader)",
    stage="static",
    sources=_SOURCES,
)
def hidden_code(context: RuleContext) -> Iterator[Finding]:
    """The static rules read Python source, and coverage measures it; code a model ships in another form
    escapes both. A machine commit that adds or changes a compiled or native file (``.pyc``, ``.pyo``,
    ``.so``, ``.pyd``, ``.dll``, ``.dylib``) or an importable archive (``.egg``, ``.whl``, ``.pyz``), and a
    machine-written line that runs code through ``runpy`` (``run_path``, ``run_module``), an import loader
    from a file (``SourceFileLoader``, ``SourcelessFileLoader``, ``spec_from_file_location``, ...),
    ``zipimport``, ``imp.load_*``, ``types.CodeType`` or ``marshal.loads``, is a finding. Ship the Python
    source instead and import it normally."""
    for file in context.change.files:
        machine = machine_may_have_touched(context, file.path) or bool(machine_lines(context, file.path))
        if file.path.endswith(HIDDEN_SUFFIXES) and file.status != "deleted" and machine:
            yield Finding(
                HIDDEN,
                "block",
                f"{file.path.rsplit('.', 1)[-1]} file {file.status} by a machine commit: code the rules and "
                "coverage cannot read",
                path=file.path,
            )
    for path, lines in context.provenance.machine_lines.items():
        source = context.head_sources.get(path)
        readable = source is not None and path.endswith(".py") and _may_hold(source, _HIDDEN_TEXTS)
        index = module_index(source, path) if readable and source is not None else None
        if index is None:
            continue
        for call in index.calls:
            if not any(n in lines for n in span(call)):
                continue
            for name in (canonical(n) for n in resolve(call.func, index.names)):
                if name in _LOADER_CALLS:
                    yield Finding(HIDDEN, "block", f"{name}() {_LOADER_CALLS[name]}", path=path, line=call.lineno)
                    break


# Every means above is named in the source by one of these texts (an import, an attribute, a key), unless
# the name is built at run time (getattr, a namespace read as a mapping, string pieces): a source without
# any of them is skipped without a parse.
_MEANS_TEXTS = (
    "_pytest", "pluggy", "coverage", "xdist", "pytest_cov", "ctypes", "_exit", "abort", "kill", "signal",
    "exit", "atexit", "settrace", "setprofile", "get_objects", "get_refer", "_getframe", "currentframe",
    "stack", "getouterframes", "addaudithook", "monitoring", "exec", "modules", "f_back", "f_globals",
    "f_locals", "f_builtins", "tb_frame", "gi_frame", "cr_frame", "pytest_plugins", "environ", "putenv",
    "setenv", "setitem", "__code__", "__globals__", "KeyboardInterrupt", "SystemExit", ".verifier-harness",
    "getattr", "__dict__", "vars(", "__builtins__", "import_module", "__import__",
)  # fmt: skip
_HIDDEN_TEXTS = (
    "runpy", "machinery", "spec_from", "module_from_spec", "zipimport", "load_source", "load_compiled",
    "CodeType", "marshal", "getattr", "__dict__", "vars(", "__builtins__", "import_module", "__import__",
)  # fmt: skip


def _may_hold(source: str, texts: tuple[str, ...]) -> bool:
    """False only when ``source`` cannot name any of the means (identifiers outside ASCII are normalised
    by the parser, so such a source is always read)."""
    return not source.isascii() or any(text in source for text in texts) or PIECES.search(source) is not None


def _harness_dir() -> str:
    """The folder the harness writes its records in, inside the sandbox's copy of the tree."""
    from verifier.testrun import harness

    return str(getattr(harness, "HARNESS_DIR", ".verifier-harness"))


class _MeansFinder:
    def __init__(self, index: ModuleIndex, path: str, lines: frozenset[int], in_test: bool, harness_dir: str) -> None:
        self.index, self.names, self.path, self.lines = index, index.names, path, lines
        self.in_test, self.harness_dir = in_test, harness_dir
        self.seen: set[int] = set()

    def finding(self, node: ast.AST, what: str) -> Iterator[Finding]:
        line = getattr(node, "lineno", 0)
        if line not in self.seen and any(n in self.lines for n in span(node)):
            self.seen.add(line)
            yield Finding(MEANS, "block", what, path=self.path, line=line, details={"means": what})

    def findings(self) -> Iterator[Finding]:
        for node in ast.walk(self.index.tree):
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                yield from self.imports(node)
            elif isinstance(node, ast.Call):
                yield from self.call(node)
            elif isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
                for decorator in node.decorator_list:  # ``@atexit.register`` calls it with the function
                    if not isinstance(decorator, ast.Call):
                        yield from self.call(
                            ast.copy_location(ast.Call(func=decorator, args=[], keywords=[]), decorator)
                        )
            elif isinstance(node, (ast.Assign, ast.AugAssign, ast.AnnAssign, ast.Delete)):
                yield from self.assignment(node)
            elif isinstance(node, ast.Attribute) and node.attr in _FRAME_ATTRIBUTES:
                yield from self.finding(node, f"reads .{node.attr} (a frame of pytest or the harness)")
            elif isinstance(node, ast.Raise):
                yield from self.raised(node)
            elif isinstance(node, ast.Constant) and isinstance(node.value, str):
                yield from self.path_text(node, node.value)

    def imports(self, node: ast.Import | ast.ImportFrom) -> Iterator[Finding]:
        modules = [a.name for a in node.names] if isinstance(node, ast.Import) else [node.module or ""]
        if isinstance(node, ast.ImportFrom) and node.level:
            return
        for module in modules:
            top = module.split(".", 1)[0]
            if top in _INTERNAL_IMPORTS:
                yield from self.finding(node, f"import of {module}: {_INTERNAL_IMPORTS[top]}")
            elif top == "ctypes":
                yield from self.finding(node, f"import of {module}: {_PREFIX_CALLS['ctypes.']}")

    def call(self, node: ast.Call) -> Iterator[Finding]:
        for name in (canonical(n) for n in resolve(node.func, self.names)):
            why = _CALLS.get(name) or next((w for p, w in _PREFIX_CALLS.items() if name.startswith(p)), None)
            if why is None and self.in_test:
                why = _TEST_ONLY_CALLS.get("os.exec" if name.startswith("os.exec") else name)
            if why is None and name in _SIGNAL_SENDERS and node.args and self.own_process(node.args[0]):
                why = "sends a signal to its own process, its parent or its group (the test run)"
            if why is None:
                why = self.module_or_setting_write(name, node)
            if why is not None:
                yield from self.finding(node, f"{name}() {why}")
                return

    def own_process(self, target: ast.expr) -> bool:
        if isinstance(target, ast.Constant) and target.value in (0, -1):
            return True
        if isinstance(target, ast.UnaryOp) and isinstance(target.operand, ast.Constant):
            return True  # -1, or -pid
        if isinstance(target, ast.Call):
            return any(canonical(n) in _OWN_PROCESS for n in resolve(target.func, self.names))
        return False

    def module_or_setting_write(self, name: str, node: ast.Call) -> str | None:
        """``sys.modules.pop("coverage")``, ``monkeypatch.setitem(sys.modules, "_pytest", x)``,
        ``os.environ.setdefault("PYTEST_ADDOPTS", ...)``, ``monkeypatch.setenv("COVERAGE_FILE", ...)``."""
        method = name.rsplit(".", 1)[-1]
        if name.startswith("sys.modules.") and method in _SYS_MODULES_WRITES:
            key = node.args[0] if node.args else None
            if method in ("clear", "update", "popitem") or _names_a_tool_module(key):
                return "changes sys.modules for a tool's module (which module pytest or coverage imports)"
        into_modules = (
            method == "setitem" and len(node.args) >= 2 and "sys.modules" in resolve(node.args[0], self.names)
        )
        if into_modules and _names_a_tool_module(node.args[1]):
            return "replaces a tool's module in sys.modules"
        if name.startswith("os.environ.") or method in ("setenv", "putenv", "setitem"):
            first = node.args[0] if node.args else None
            keys: list[ast.expr] = list(node.args[:2])
            if isinstance(first, ast.Dict):
                keys = [k for k in first.keys if k is not None]
            if any(_is_tool_setting(constant_string(k) or "") for k in keys):
                return "sets pytest or coverage settings in the environment of the run"
        return None

    def assignment(self, node: ast.Assign | ast.AugAssign | ast.AnnAssign | ast.Delete) -> Iterator[Finding]:
        targets = node.targets if isinstance(node, (ast.Assign, ast.Delete)) else [node.target]
        for target in targets:
            if isinstance(target, ast.Name) and target.id == "pytest_plugins" and not isinstance(node, ast.Delete):
                yield from self.finding(node, "pytest_plugins declared in a module: loads test plugins into the run")
            if isinstance(target, ast.Subscript):
                meanings = resolve(target.value, self.names)
                if "sys.modules" in meanings and _names_a_tool_module(target.slice):
                    yield from self.finding(node, "changes sys.modules for a tool's module (pytest's or coverage's)")
                elif "os.environ" in meanings and _is_tool_setting(constant_string(target.slice) or ""):
                    yield from self.finding(node, "sets pytest or coverage settings in the environment of the run")
            if isinstance(target, ast.Attribute):
                meanings = resolve(target, self.names)
                if "sys.modules" in meanings:
                    yield from self.finding(node, "replaces sys.modules")
                elif target.attr in ("__code__", "__globals__"):
                    yield from self.finding(node, f"replaces a function's {target.attr}")

    def raised(self, node: ast.Raise) -> Iterator[Finding]:
        exc = node.exc.func if isinstance(node.exc, ast.Call) else node.exc
        names = [canonical(n) for n in resolve(exc, self.names)] if exc is not None else []
        if "KeyboardInterrupt" in names:
            yield from self.finding(node, "raises KeyboardInterrupt, which ends the pytest session early")
        elif self.in_test and "SystemExit" in names:
            yield from self.finding(node, "raises SystemExit in a test, which ends the test process")

    def path_text(self, node: ast.Constant, text: str) -> Iterator[Finding]:
        base = text.replace("\\", "/").rstrip("/").rsplit("/", 1)[-1]
        if self.harness_dir and self.harness_dir in text:
            where = f"names the harness's folder ({self.harness_dir}), where the run's records are"
            yield from self.finding(node, where)
        elif base == ".coverage" or base.startswith(".coverage."):
            yield from self.finding(node, f"names coverage.py's data file ({base})")


_TOOL_MODULES = frozenset({"pytest", "_pytest", "coverage", "pluggy", "xdist", "pytest_cov", "py"})


def _names_a_tool_module(key: ast.AST | None) -> bool:
    """A key of ``sys.modules`` that is a tool's module, or one the source does not fix."""
    text = constant_string(key) if key is not None else None
    return text is None or text.split(".", 1)[0] in _TOOL_MODULES


def _is_tool_setting(name: str) -> bool:
    return name.startswith(_ENVIRONMENT_PREFIXES)


def means_of(source: str, path: str = "<test>", in_test: bool = True) -> list[str]:
    """The means ``source`` uses, one message per line (every line counted as machine-written)."""
    index = module_index(source, path, keep=False)
    if index is None:
        return []
    lines = frozenset(range(1, source.count("\n") + 2))
    return [f.message for f in _MeansFinder(index, path, lines, in_test, _harness_dir()).findings()]
