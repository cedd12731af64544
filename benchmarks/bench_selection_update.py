"""Updating the who-tests-what map after a few base commits against building it, side by side in one run.

The library is a real open-source project installed from PyPI as an sdist (more-itertools by default).
Its sdist is the first commit; a model-style one-function change on top is checked once, which builds
and caches the map of that base. Then the base moves: a person edits three more functions (three
commits), and a model-style change sits on top again. Timed in turn, several rounds (A B A B ...):

* update: ``verifier check`` with the old base's map cached (it updates the map: the tests the three
  commits can affect run again at the new base, the other records are carried over);
* build:  ``verifier check`` with no cached map (the whole suite at the new base under coverage);
* warm:   ``verifier check`` with the new base's map cached (what both of the others also do: the run at head).

Printed: the whole checks' ratio (update / build) and the maps' own ratio, the warm check's time taken
off both ((update - warm) / (build - warm)); the bar (at most 0.3) is on the maps' ratio.
Usage: ``python benchmarks/bench_selection_update.py [rounds]``.
Needs the network for the download (PyPI only). Not run by CI.
"""

from __future__ import annotations

import shutil
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

from bench_gate_overhead import fetch_sdist
from bench_selection_speed import DEFAULT, POLICY, one_function_change, timed

from verifier.demo.scratch import ScratchRepo

PERSON_EDITS = ("def first(", "def last(", "def nth_or_last(")  # functions of more_itertools/more.py


def person_edit(repo: ScratchRepo, path: str, anchor: str) -> None:
    one_function_change(repo, path, anchor)
    repo.git("commit", "-q", "--amend", "-m", f"Tidy {anchor.strip()} (by a person)")


def main() -> None:
    rounds = int(sys.argv[1]) if len(sys.argv) > 1 else 2
    requirement, path, anchor = DEFAULT
    with tempfile.TemporaryDirectory(prefix="bench-update-") as scratch:
        folder = Path(scratch)
        project = fetch_sdist(requirement, folder / "sdist")
        (project / "verifier.yaml").write_text(POLICY)
        repo = ScratchRepo(project)
        repo.git("add", "-A")
        repo.git("commit", "-q", "-m", f"Import {requirement}")
        first = repo.head()
        one_function_change(repo, path, anchor)
        gate = [sys.executable, "-m", "verifier", "-C", str(repo.path), "check", "HEAD"]
        cache = repo.path / ".git" / "verifier" / "cache"
        subprocess.run(gate, capture_output=True, check=False)  # the old base's map
        old_maps = {p.name: p.read_bytes() for p in (cache / "impact").glob("*.json")}
        repo.git("reset", "-q", "--hard", first)
        for edited in PERSON_EDITS:
            person_edit(repo, path, edited)
        one_function_change(repo, path, anchor)
        times: dict[str, list[float]] = {"update": [], "build": [], "warm": []}
        last = ""
        for _round in range(rounds):
            shutil.rmtree(cache, ignore_errors=True)
            (cache / "impact").mkdir(parents=True)
            for name, data in old_maps.items():
                (cache / "impact" / name).write_bytes(data)
            seconds, last = timed(gate)
            times["update"].append(seconds)
            shutil.rmtree(cache, ignore_errors=True)
            times["build"].append(timed(gate)[0])
            times["warm"].append(timed(gate)[0])
    medians = {name: statistics.median(values) for name, values in times.items()}
    print(f"library: {requirement}; base moved by {len(PERSON_EDITS)} one-function commits")
    print(f"last update report:\n{last}")
    for name, values in times.items():
        print(f"{name:>6}: median {medians[name]:.2f}s of {', '.join(f'{v:.2f}' for v in values)}")
    print(f"update / build (whole checks) = {medians['update'] / medians['build']:.2f}")
    ratio = (medians["update"] - medians["warm"]) / max(medians["build"] - medians["warm"], 1e-9)
    print(f"map update / map build = {ratio:.2f} (bar: at most 0.30) -> {'met' if ratio <= 0.3 else 'NOT met'}")


if __name__ == "__main__":
    main()
