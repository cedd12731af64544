"""JUnit XML of the gate's verdict and of the tests it ran, for CI systems that show test results from such a file.

Two suites. The first, ``verifier``, has one ``testcase`` per pytest node id (``classname`` and ``name``
split the way pytest's own ``--junitxml`` splits them: the module path with dots, then the classes, then
the function with its parameters); a failing test carries pytest's report of its failure. Collection
errors and a run that did not finish become ``error`` test cases, so that a CI view never shows a green
suite for tests that never ran. The second, ``verifier.verdict``, has one test case per finding: every
blocking finding fails, so a BLOCK is never shown green beside a failed job.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

from verifier.models import Finding, Report, TestOutcome
from verifier.report.bounds import LEFT_OUT_REPORT, shortened, valid_text

SUFFIX = "junit.xml"  # a report of this format written into a folder is report.junit.xml
FOR_MACHINES = True  # tools read it: alone on stdout
VERDICT_SUITE = "verifier.verdict"
MAX_SUMMARY_CHARS = 200  # characters of a failure's one-line summary (its message attribute)


def render(report: Report) -> str:
    suites = ET.Element("testsuites", name="verifier")
    suites.append(_tests_suite(report))
    suites.append(_verdict_suite(report))
    _set_counts(suites, [case for suite in suites for case in suite.iter("testcase")])
    suites.set("time", f"{report.run.wall_seconds:.3f}" if report.run else "0")
    ET.indent(suites)
    # a name's bytes that are not UTF-8 (held as surrogate escapes) are written as the text \xNN
    return '<?xml version="1.0" encoding="utf-8"?>\n' + str(valid_text(ET.tostring(suites, encoding="unicode"))) + "\n"


def _tests_suite(report: Report) -> ET.Element:
    """The tests the gate ran, each failing one with pytest's report of the failure; the run's console
    tail (where pytest prints the failures' captured output) as the suite's ``system-out``."""
    suite = ET.Element("testsuite", name="verifier")
    cases = [_case(test) for test in report.run.tests] if report.run else []
    if report.run is not None:
        cases += [_error_case("collection", error, "collection error") for error in report.run.collection_errors]
        if report.run.status not in ("completed", "no-tests") and not report.run.collection_errors:
            cases.append(_error_case("verifier", "run", f"the test run did not complete: {report.run.status}"))
    suite.extend(cases)
    _set_counts(suite, cases)
    suite.set("time", f"{report.run.wall_seconds:.3f}" if report.run else "0")
    if cases and report.run is not None and report.run.output_tail.strip():
        _text_child(suite, "system-out", report.run.output_tail)
    return suite


def _verdict_suite(report: Report) -> ET.Element:
    """The gate's verdict: one test case per finding, in a suite of its own. A blocking finding fails,
    a finding that stopped verification is an error; warnings and waived findings pass, their message in
    ``system-out``. The verdict itself is a property of the suite."""
    suite = ET.Element("testsuite", name=VERDICT_SUITE)
    properties = ET.SubElement(suite, "properties")
    for name, value in (("verdict", report.verdict), ("policy", report.policy_source), ("change", report.change.spec)):
        ET.SubElement(properties, "property", name=name, value=_xml_safe(value))
    cases = [_finding_case(finding) for finding in report.findings]
    suite.extend(cases)
    _set_counts(suite, cases)
    suite.set("time", "0")
    return suite


def _finding_case(finding: Finding) -> ET.Element:
    where = finding.path or "the whole change"
    if finding.path and finding.line:
        where += f":{finding.line}"
    case = ET.Element("testcase", classname=f"{VERDICT_SUITE}.{finding.rule}", name=_xml_safe(where), time="0")
    if finding.severity == "block":
        child = ET.SubElement(case, "failure", message=_xml_safe(finding.message), type=finding.rule)
        child.text = _xml_safe(_finding_text(finding))
    elif finding.severity == "error":
        child = ET.SubElement(case, "error", message=_xml_safe(finding.message), type=finding.rule)
        child.text = _xml_safe(_finding_text(finding))
    else:
        _text_child(case, "system-out", _finding_text(finding))
    return case


def _finding_text(finding: Finding) -> str:
    waiver = finding.details.get("waived_by")
    if isinstance(waiver, dict):
        return (
            f"waived: {finding.message} (waiver of {waiver.get('rule')} by {waiver.get('owner')}, "
            f"expires {waiver.get('expires')}, {waiver.get('source')}: {waiver.get('reason')})"
        )
    text = f"{finding.severity}: {finding.message}"
    tail = finding.details.get("output_tail")
    return f"{text}\n{tail}" if tail else text


def _text_child(parent: ET.Element, tag: str, text: str) -> None:
    ET.SubElement(parent, tag).text = _xml_safe(text)


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
        if test.message != LEFT_OUT_REPORT:  # the marker once, as the message, is enough
            child.text = _xml_safe(test.message)
    elif test.outcome == "skipped":
        ET.SubElement(case, "skipped", message=_summary_line(test.message) or "skipped")
    return case


def _error_case(classname: str, name: str, message: str) -> ET.Element:
    case = ET.Element("testcase", classname=classname, name=name, time="0")
    child = ET.SubElement(case, "error", message=_summary_line(message))
    child.text = _xml_safe(message)
    return case


def _set_counts(element: ET.Element, cases: list[ET.Element]) -> None:
    element.set("tests", str(len(cases)))
    for key, tag in (("failures", "failure"), ("errors", "error"), ("skipped", "skipped")):
        element.set(key, str(sum(1 for case in cases if case.find(tag) is not None)))


def _summary_line(message: str) -> str:
    """The last non-blank line: where pytest's long report names the error."""
    lines = [line.strip() for line in message.strip().splitlines() if line.strip()]
    return _xml_safe(shortened(lines[-1], MAX_SUMMARY_CHARS) if lines else "")


def _xml_safe(text: str) -> str:
    """XML 1.0 has no place for most control characters; drop them (test output can hold anything)."""
    return "".join(ch for ch in text if ch in "\t\n\r" or ord(ch) >= 0x20)


def render_error(message: str, exit_code: int) -> str:
    """The gate stopped before a verdict: one suite with one test case in error, never an empty green file."""
    suites = ET.Element("testsuites", name="verifier")
    suite = ET.SubElement(suites, "testsuite", name=VERDICT_SUITE)
    suite.append(_error_case(VERDICT_SUITE, "verdict", f"{message} (exit code {exit_code})"))
    for element in (suites, suite):
        _set_counts(element, list(suite))
        element.set("time", "0")
    ET.indent(suites)
    return '<?xml version="1.0" encoding="utf-8"?>\n' + str(valid_text(ET.tostring(suites, encoding="unicode"))) + "\n"
