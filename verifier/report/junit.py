"""JUnit XML of the tests the gate ran, for CI systems that show test results from such a file.

One ``testsuite`` named ``verifier`` with one ``testcase`` per pytest node id (``classname`` and ``name``
split the way pytest's own ``--junitxml`` splits them: the module path with dots, then the classes, then
the function with its parameters). Collection errors and a run that did not finish become ``error``
test cases, so that a CI view never shows a green suite for tests that never ran.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

from verifier.models import Report, TestOutcome

SUFFIX = "junit.xml"  # a report of this format written into a folder is report.junit.xml
FOR_MACHINES = True  # tools read it: alone on stdout


def render(report: Report) -> str:
    suites = ET.Element("testsuites")
    suite = ET.SubElement(suites, "testsuite", name="verifier")
    cases = [_case(test) for test in report.run.tests] if report.run else []
    if report.run is not None:
        cases += [_error_case("collection", error, "collection error") for error in report.run.collection_errors]
        if report.run.status not in ("completed", "no-tests") and not report.run.collection_errors:
            cases.append(_error_case("verifier", "run", f"the test run did not complete: {report.run.status}"))
    for case in cases:
        suite.append(case)
    counts = _counts(cases)
    time = f"{report.run.wall_seconds:.3f}" if report.run else "0"
    for element in (suites, suite):
        element.attrib.update({key: str(value) for key, value in counts.items()})
        element.set("time", time)
    ET.indent(suites)
    return '<?xml version="1.0" encoding="utf-8"?>\n' + ET.tostring(suites, encoding="unicode") + "\n"


def split_node_id(node_id: str) -> tuple[str, str]:
    """``tests/test_a.py::TestX::test_y[1]`` -> (``tests.test_a.TestX``, ``test_y[1]``)."""
    parts = node_id.split("::")
    module = parts[0].removesuffix(".py").replace("/", ".")
    if len(parts) == 1:
        return module, module
    return ".".join([module, *parts[1:-1]]), parts[-1]


def _case(test: TestOutcome) -> ET.Element:
    classname, name = split_node_id(test.node_id)
    case = ET.Element("testcase", classname=classname, name=name, time=f"{test.duration:.3f}")
    if test.outcome in ("failed", "error"):
        tag = "failure" if test.outcome == "failed" else "error"
        child = ET.SubElement(case, tag, message=_summary_line(test.message))
        child.text = _xml_safe(test.message)
    elif test.outcome == "skipped":
        ET.SubElement(case, "skipped", message=_summary_line(test.message) or "skipped")
    return case


def _error_case(classname: str, name: str, message: str) -> ET.Element:
    case = ET.Element("testcase", classname=classname, name=name, time="0")
    child = ET.SubElement(case, "error", message=_summary_line(message))
    child.text = _xml_safe(message)
    return case


def _counts(cases: list[ET.Element]) -> dict[str, int]:
    return {
        "tests": len(cases),
        "failures": sum(1 for c in cases if c.find("failure") is not None),
        "errors": sum(1 for c in cases if c.find("error") is not None),
        "skipped": sum(1 for c in cases if c.find("skipped") is not None),
    }


def _summary_line(message: str) -> str:
    """The last non-blank line: where pytest's long report names the error."""
    lines = [line.strip() for line in message.strip().splitlines() if line.strip()]
    return _xml_safe(lines[-1] if lines else "")


def _xml_safe(text: str) -> str:
    """XML 1.0 has no place for most control characters; drop them (test output can hold anything)."""
    return "".join(ch for ch in text if ch in "\t\n\r" or ord(ch) >= 0x20)


def render_error(message: str, exit_code: int) -> str:
    """The gate stopped before a verdict: one suite with one test case in error, never an empty green file."""
    suites = ET.Element("testsuites")
    suite = ET.SubElement(suites, "testsuite", name="verifier")
    suite.append(_error_case("verifier", "verdict", f"{message} (exit code {exit_code})"))
    counts = _counts(list(suite))
    for element in (suites, suite):
        element.attrib.update({key: str(value) for key, value in counts.items()})
        element.set("time", "0")
    ET.indent(suites)
    return '<?xml version="1.0" encoding="utf-8"?>\n' + ET.tostring(suites, encoding="unicode") + "\n"
