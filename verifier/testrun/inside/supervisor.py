"""The harness's supervisor: the sandbox's first process, which the tests can neither inspect nor outlive.

Started by the sandbox as ``python -I <harness folder>/supervisor.py <harness folder>``. It reads its
settings file and deletes it (the file holds the key that seals the results), makes itself
non-dumpable (so processes of the same user can neither trace it nor open its ``/proc`` files), and
then, for the run and each re-run of failing tests, starts :mod:`session` as a child in its own
session with two pipes: one carrying the child's settings (read and closed before any test runs), one
carrying the recorder's records back. After each child ends, its process group is killed and what is
left on the records pipe is read, within a time and a size bound.

After the first run it reads coverage.py's data file once, checks it against the digest the child sent
when it saved it, and converts it into plain JSON: executed lines, arcs and per-test contexts of every
measured file. Everything goes into one sealed file, ``out/sealed.json``: an HMAC-SHA256 of the body
with the key, then the body. The gate checks the seal and every count; this module decides nothing.
Standard library and coverage.py only.
"""

from __future__ import annotations

import contextlib
import ctypes
import hashlib
import hmac
import importlib.util
import json
import os
import select
import signal
import subprocess
import sys
import tempfile
import threading
import time
from typing import Any

FORMAT = 1
RECORDS_CAP_BYTES = 32 << 20  # bytes read from one child's records pipe; beyond it the run is unverifiable
COVERAGE_CAP_BYTES = 24 << 20  # size of the coverage export; beyond it coverage is left out (unverifiable)
DATA_FILE_CAP_BYTES = 256 << 20  # coverage.py's data file is read into memory at most this large
DRAIN_SECONDS = 5.0  # how long the records pipe may stay open after the child ended
PR_SET_DUMPABLE = 4
PROGRESS_SECONDS = 0.25  # at most one progress line this often (the lines count against the output cap)
PROGRESS_PENDING_CAP = 1 << 20  # bytes of an unfinished record line the progress display looks at


def make_undumpable() -> bool:
    """prctl(PR_SET_DUMPABLE, 0): same-user processes can no longer ptrace us or open /proc/<pid>/fd, mem."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return int(libc.prctl(PR_SET_DUMPABLE, 0, 0, 0, 0)) == 0
    except (OSError, AttributeError):
        return False


def load_settings(folder: str) -> dict[str, Any]:
    """Read the settings and remove the file, so the key is only in this process's memory."""
    path = os.path.join(folder, "settings.json")
    with open(path, encoding="utf-8") as handle:
        settings = json.load(handle)
    os.unlink(path)
    return dict(settings)


class ProgressLines:
    """Per-test progress for the host's display, written to stdout as ``<token> <done> <total> <node id>``
    lines while the records arrive. Display only: the host removes these lines from the output and judges
    the sealed records alone."""

    def __init__(self, token: str) -> None:
        self.token = token
        self.pending = b""
        self.done = self.total = 0
        self.current = ""
        self.last = 0.0
        self.unsent = False

    def feed(self, chunk: bytes) -> None:
        *lines, self.pending = (self.pending + chunk).split(b"\n")
        if len(self.pending) > PROGRESS_PENDING_CAP:
            self.pending = b""
        for line in lines:
            self._record(line)

    def _record(self, line: bytes) -> None:
        try:
            record = json.loads(line)
        except ValueError:
            return
        if not isinstance(record, dict):
            return
        kind = record.get("kind")
        if kind == "collected" and isinstance(record.get("count"), int):
            self.total = record["count"]
        elif kind == "start":
            self.current = " ".join(str(record.get("nodeid")).split())[:200]
        elif kind == "phase" and record.get("when") == "teardown":
            self.done += 1
        else:
            return
        self.unsent = True
        self.flush(at_most_every=PROGRESS_SECONDS)

    def flush(self, at_most_every: float = 0.0) -> None:
        """Write the latest state if it was not written yet (and the last line is ``at_most_every`` old)."""
        now = time.monotonic()
        if self.unsent and now - self.last >= at_most_every:
            self.last, self.unsent = now, False
            with contextlib.suppress(OSError):  # one write, shorter than a pipe's atomic size
                os.write(1, f"{self.token} {self.done} {self.total} {self.current}\n".encode("utf-8", "replace"))


class RecordReader(threading.Thread):
    """Reads JSON-line records from a pipe into a list, at most ``cap`` bytes."""

    def __init__(self, fd: int, cap: int = RECORDS_CAP_BYTES, progress: ProgressLines | None = None) -> None:
        super().__init__(daemon=True)
        self.fd, self.cap = fd, cap
        self.buffer = bytearray()
        self.overflow = False
        self.progress = progress

    def run(self) -> None:
        while True:
            if self.progress is not None and not select.select([self.fd], [], [], PROGRESS_SECONDS)[0]:
                self.progress.flush(at_most_every=PROGRESS_SECONDS)  # the state a throttled record left
                continue
            try:
                chunk = os.read(self.fd, 1 << 16)
            except OSError:
                break
            if not chunk:
                break
            if len(self.buffer) + len(chunk) > self.cap:
                self.overflow = True
                continue  # keep reading (and dropping) so the child never blocks on a full pipe
            self.buffer += chunk
            if self.progress is not None:
                self.progress.feed(chunk)

    def records(self) -> tuple[list[Any], int]:
        """The records read, and how many lines were not JSON."""
        parsed: list[Any] = []
        bad = 0
        for line in bytes(self.buffer).split(b"\n"):
            if not line.strip():
                continue
            try:
                parsed.append(json.loads(line))
            except ValueError:
                bad += 1
        return parsed, bad


def run_child(settings: dict[str, Any], child: dict[str, Any], progress: str | None = None) -> dict[str, Any]:
    """Run one pytest session (``session.py``) and gather what it reported (with ``progress``, a token:
    per-test progress lines on stdout)."""
    records_read, records_write = os.pipe()
    settings_read, settings_write = os.pipe()
    reader = RecordReader(records_read, progress=ProgressLines(progress) if progress else None)
    reader.start()
    command = [sys.executable, "-I", os.path.join(settings["harness"], "session.py")]
    process = subprocess.Popen(
        [*command, str(records_write), str(settings_read)],
        pass_fds=(records_write, settings_read),
        start_new_session=True,
    )
    os.close(records_write)
    os.close(settings_read)
    with os.fdopen(settings_write, "wb") as stream, contextlib.suppress(BrokenPipeError):
        stream.write(json.dumps(child).encode())
    returncode = process.wait()
    with contextlib.suppress(ProcessLookupError, PermissionError):
        os.killpg(process.pid, signal.SIGKILL)  # what the tests left behind in the child's session
    reader.join(DRAIN_SECONDS)
    held_open = reader.is_alive()
    if not held_open:  # else the reader still blocks on it: closing would let a later pipe reuse the number
        os.close(records_read)
    records, bad_lines = reader.records()
    return {
        "returncode": returncode,
        "records": records,
        "bad_lines": bad_lines,
        "overflow": reader.overflow,
        "held_open": held_open,
    }


def failing(records: list[Any]) -> list[str]:
    """Node ids with a failed phase or subtest (an expected failure excepted), in the order first seen."""
    found: dict[str, None] = {}
    for record in records:
        if not isinstance(record, dict) or record.get("kind") not in ("phase", "subtest") or record.get("xfail"):
            continue
        if record.get("outcome") == "failed":
            found[str(record.get("nodeid"))] = None
    return list(found)


def read_capped(path: str, cap: int = DATA_FILE_CAP_BYTES) -> bytes | None:
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError:
        return None
    try:
        data = os.read(fd, cap + 1)
        chunks = [data]
        while data and sum(map(len, chunks)) <= cap:
            data = os.read(fd, 1 << 20)
            chunks.append(data)
    finally:
        os.close(fd)
    joined = b"".join(chunks)
    return None if len(joined) > cap else joined


def export_coverage(data_file: bytes) -> dict[str, Any]:
    """coverage.py's data as plain JSON: per file its executed lines, its arcs, and per line the
    indexes of the contexts that executed it (into ``contexts``)."""
    from coverage import CoverageData

    with tempfile.TemporaryDirectory(prefix="verifier-export-") as folder:
        path = os.path.join(folder, "data")
        with open(path, "wb") as copy:
            copy.write(data_file)
        data = CoverageData(basename=path)
        data.read()
        labels: dict[str, int] = {}
        files: dict[str, Any] = {}
        named = bool(data.measured_contexts() - {""})
        for name in sorted(data.measured_files()):
            arcs = data.arcs(name)
            by_line = data.contexts_by_lineno(name) if named else {}
            files[name] = {
                "lines": sorted(data.lines(name) or ()),
                "arcs": sorted([a, b] for a, b in arcs) if arcs is not None else None,
                "contexts": {
                    str(line): sorted(labels.setdefault(c, len(labels)) for c in contexts)
                    for line, contexts in by_line.items()
                },
            }
        return {"contexts": list(labels), "files": files}


def coverage_result(settings: dict[str, Any], first: dict[str, Any]) -> tuple[dict[str, Any] | None, str | None]:
    """The coverage export, or why there is none."""
    if not settings.get("measure"):
        return None, None
    digests = [r for r in first["records"] if isinstance(r, dict) and r.get("kind") == "coverage"]
    if len(digests) != 1 or not isinstance(digests[0].get("sha256"), str):
        return None, "the test session did not save its coverage data"
    data = read_capped(settings["data_file"])
    if data is None:
        return None, "coverage data file missing, not a regular file, or too large"
    if not hmac.compare_digest(hashlib.sha256(data).hexdigest(), digests[0]["sha256"]):
        return None, "coverage data file changed after the test session saved it"
    try:
        export = export_coverage(data)
    except Exception as error:  # a damaged data file: the gate cannot verify coverage
        return None, f"coverage data file unreadable: {type(error).__name__}"
    if len(json.dumps(export)) > COVERAGE_CAP_BYTES:
        return None, f"coverage data larger than the export cap ({COVERAGE_CAP_BYTES} bytes)"
    return export, None


def can_spread(workers: int) -> bool:
    """pytest-xdist is installed and coverage.py is new enough (7.10) to measure its workers."""
    if workers <= 1 or importlib.util.find_spec("xdist") is None:
        return False
    import coverage

    return tuple(int(part) for part in coverage.__version__.split(".")[:2]) >= (7, 10)


def pytest_args(settings: dict[str, Any]) -> list[str]:
    """The harness's own arguments, the workers (started isolated, like this process), then the targets."""
    spread = []
    if settings["spread"]:
        spread = ["--dist", "load", "--tx", f"{int(settings['workers'])}*popen//python={sys.executable} -I"]
    return [*settings["args"], *spread, *settings["targets"]]


def child_settings(settings: dict[str, Any], selection: Any, measure: bool, data_file: str) -> dict[str, Any]:
    return {
        "harness": settings["harness"],
        "plugin": settings["plugin"],
        "path": settings["path"],
        "modules": settings.get("modules", []),
        "args": pytest_args(settings),
        "selection": selection,
        "spread": settings["spread"],
        "measure": measure,
        "coveragerc": settings["coveragerc"],
        "data_file": data_file,
    }


def supervise(settings: dict[str, Any]) -> dict[str, Any]:
    """The run, its coverage export and the re-runs of failing tests; the body of the sealed file."""
    data_dir = os.path.join(settings["harness"], "data")
    measure = bool(settings.get("measure", True))
    first_file = os.path.join(data_dir, "run")
    first_settings = child_settings(settings, settings.get("selection"), measure, first_file)
    first = run_child(settings, first_settings, settings.get("progress"))
    coverage, coverage_problem = coverage_result({**settings, "measure": measure, "data_file": first_file}, first)
    reruns = []
    still = failing(first["records"])
    for attempt in range(1, int(settings.get("reruns", 0)) + 1):
        if not still:
            break
        # The re-run starts the way the run did (same command, environment, arguments, coverage); only
        # the filter, which no test can read, differs.
        selection = {"whole_suite": False, "node_ids": still, "files": [], "shard": None}
        again = run_child(settings, child_settings(settings, selection, measure, os.path.join(data_dir, "run")))
        reruns.append({"attempt": attempt, "asked": still, **again})
        still = [n for n in failing(again["records"]) if n in still]
    return {
        "format": FORMAT,
        "dumpable": settings.get("_dumpable"),
        "spread": settings["spread"],
        "run": first,
        "coverage": coverage,
        "coverage_problem": coverage_problem,
        "reruns": reruns,
    }


def seal(key: bytes, body: bytes) -> bytes:
    """The sealed file: the body's HMAC-SHA256 in hex, a newline, the body."""
    return hmac.new(key, body, hashlib.sha256).hexdigest().encode() + b"\n" + body


def main(argv: list[str]) -> int:
    folder = os.path.abspath(argv[1])
    dumpable_off = make_undumpable()
    settings = load_settings(folder)
    key = bytes.fromhex(settings.pop("key"))
    settings["harness"] = folder
    settings["spread"] = can_spread(int(settings.get("workers", 1)))
    settings["coveragerc"] = os.path.join(folder, "coveragerc-parallel" if settings["spread"] else "coveragerc")
    settings["_dumpable"] = not dumpable_off
    os.makedirs(os.path.join(folder, "data"), exist_ok=True)
    os.makedirs(os.path.join(folder, "out"), exist_ok=True)
    body = json.dumps(supervise(settings), separators=(",", ":")).encode()
    target = os.path.join(folder, "out", "sealed.json")
    with contextlib.suppress(FileNotFoundError):
        os.unlink(target)  # whatever the tests put there
    fd = os.open(target, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW, 0o600)
    with os.fdopen(fd, "wb") as out:
        out.write(seal(key, body))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv))
