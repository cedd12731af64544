"""Joining the reports of ``verifier check --part K/N`` into the verdict of one run.

Each part's JSON report carries what it ran (every test's outcome, the coverage measurements of the
machine-written files, the base outcomes of a differential run) in its ``part`` section. The join
checks that the reports belong together (same change, same selection, each part of N exactly once),
joins the runs (tests side by side; a line is executed when any part executed it) and judges the
joined run with the gate's own stages, re-read from the repository: the verdict is the one a single run
of all the selected tests would have given. A part that did not complete makes the joined run
incomplete, as it would have been.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from verifier.errors import UsageError
from verifier.models import FileCoverage, Report, RunResult, RunStatus, Selection, TestOutcome
from verifier.words import counted

_STATUS_ORDER = ("timeout", "crashed", "collection-error", "harness-error", "no-tests", "completed")


def join_reports(repo: str | Path, paths: Sequence[Path], sandbox: str = "auto") -> Report:
    """The report of the change the part reports at ``paths`` checked, judged as one run."""
    from verifier.change.stage import RevisionSpec
    from verifier.mutation.join import joined_mutation
    from verifier.pipeline import Options, verify

    reports = [_read(path) for path in paths]
    first = _check_together(reports, paths)
    if not first.get("base"):
        raise UsageError("the parts checked a change without a base revision", hint="run that check without --part")
    selection, run = joined_run(reports)
    spec = RevisionSpec(text=f"{first['base']}..{first['head']}")
    mutation = joined_mutation(reports)  # each part ran the mutants against its share of the tests
    return verify(repo, spec, Options(sandbox=sandbox, premade=(selection, run), premade_mutation=mutation))


def _read(path: Path) -> dict[str, Any]:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except OSError as error:
        raise UsageError(f"cannot read the report {path}: {error.strerror}") from error
    except ValueError as error:
        raise UsageError(f"{path} is not a JSON report: {error}") from error
    if isinstance(data, dict) and isinstance(data.get("shard"), dict):
        raise UsageError(
            f"{path} was written with the old option --shard, which was renamed --part",
            hint="write each part's report again with: verifier check --part K/N --format json --output F",
        )
    if not isinstance(data, dict) or not isinstance(data.get("part"), dict):
        raise UsageError(
            f"{path} is not the JSON report of a check with --part",
            hint="write each part's report with: verifier check --part K/N --format json --output F",
        )
    return data


def _check_together(reports: list[dict[str, Any]], paths: Sequence[Path]) -> dict[str, Any]:
    first = reports[0]
    total = first["part"]["total"]
    seen: dict[int, Path] = {}
    for report, path in zip(reports, paths, strict=True):
        for key in ("base", "head"):
            if report.get(key) != first.get(key):
                raise UsageError(f"{path} checked another change ({key} {report.get(key)} vs {first.get(key)})")
        if report["part"]["total"] != total or report["part"]["selection"] != first["part"]["selection"]:
            raise UsageError(
                f"{path} comes from another split of the tests than {paths[0]}",
                hint="all parts must run with the same policy, cache state and --part N",
            )
        index = report["part"]["index"]
        if index in seen:
            raise UsageError(f"part {index}/{total} is given twice ({seen[index]} and {path})")
        seen[index] = path
    for index in range(1, total + 1):
        if index not in seen:
            raise UsageError(f"part {index}/{total} is missing", hint=f"pass the reports of all {total} parts")
    return first


def joined_run(reports: list[dict[str, Any]]) -> tuple[Selection, RunResult]:
    """The selection the parts shared and the run they made together."""
    parts = [report["part"] for report in reports]
    tests = tuple(_outcome(test) for part in parts for test in part["tests"])
    baselines = [part.get("baseline") for part in parts]
    baseline = None if any(b is None for b in baselines) else {k: v for b in baselines for k, v in b.items()}
    status: RunStatus = min((part["status"] for part in parts), key=_STATUS_ORDER.index)
    if status == "no-tests" and tests:
        status = "completed"  # an empty part; the others ran the tests
    run = RunResult(
        status=status,
        backend=reports[0].get("sandbox") or "unknown",
        isolation=reports[0].get("isolation") or "",
        pytest_exit=None,
        tests=tests,
        coverage=_joined_coverage([part["coverage"] for part in parts]),
        collection_errors=tuple(e for part in parts for e in part.get("collection_errors", [])),
        wall_seconds=max((report.get("run") or {}).get("wall_seconds", 0.0) for report in reports),
        baseline=baseline,
    )
    chosen = parts[0]["selection"]
    selection = Selection(
        whole_suite=chosen["whole_suite"],
        node_ids=tuple(chosen["node_ids"]),
        files=tuple(chosen["files"]),
        reason=f"{chosen['reason']} (joined from {counted(len(parts), 'part')})",
        reasons=reports[0].get("selection", {}).get("selected", {}),
        map_status=reports[0].get("selection", {}).get("map", "not used"),
    )
    return selection, run


def _outcome(data: Mapping[str, Any]) -> TestOutcome:
    return TestOutcome(
        node_id=data["node_id"],
        outcome=data["outcome"],
        message=data.get("message", ""),
        duration=float(data.get("duration", 0.0)),
        attempts=int(data.get("attempts", 1)),
        fixtures=tuple(data.get("fixtures", ())),
    )


def _joined_coverage(parts: list[Mapping[str, Mapping[str, list[int]]]]) -> dict[str, FileCoverage]:
    """A statement is executed when any part executed it; missing when every part that measured it missed it."""
    joined: dict[str, FileCoverage] = {}
    for path in sorted({path for part in parts for path in part}):
        measured = [part[path] for part in parts if path in part]
        executed = frozenset(line for m in measured for line in m["executed"])
        missing = frozenset(line for m in measured for line in m["missing"]) - executed
        excluded = frozenset(line for m in measured for line in m.get("excluded", []))
        joined[path] = FileCoverage(path, executed, missing, excluded)
    return joined
