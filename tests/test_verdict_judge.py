"""The verdict stage as plain functions on data: per-path settings, waivers, caps, the decision, exit codes."""

from __future__ import annotations

import pytest

from verifier.errors import ExitCode
from verifier.models import Finding, PathOverride, Policy, Waiver
from verifier.verdict.decision import decide, exit_code
from verifier.verdict.judge import capped, judge
from verifier.verdict.settings import enabled_anywhere, settings_for_path

WAIVER = Waiver("code.syntax", "legacy/**", "generated", "ada.okafor", "2999-12-31", "v.yaml:9")
POLICY = Policy(
    source="v.yaml",
    rules={"patch.size": "advise"},
    overrides=(PathOverride(("legacy/**",), "v.yaml:3", rules={"patch.size": "ignore", "deps.added": "block"}),),
    waivers=(WAIVER,),
)


def finding(rule: str, path: str | None = "src/a.py", severity: str = "block", **details: object) -> Finding:
    return Finding(rule, severity, "m", path=path, line=1 if path else None, details=details)  # type: ignore[arg-type]


def test_the_policy_sets_the_severity_a_rule_reported() -> None:
    [judged] = judge(POLICY, [finding("patch.size", severity="block")])
    assert judged.severity == "warn"  # the policy says warn, whatever the rule reported


def test_an_override_switches_a_rule_off_for_its_paths_only() -> None:
    judged = judge(POLICY, [finding("patch.size", "legacy/old.py"), finding("patch.size", "src/a.py")])
    assert [(f.path, f.severity) for f in judged] == [("src/a.py", "warn")]
    assert enabled_anywhere(POLICY, "patch.size", "advise")
    assert not enabled_anywhere(Policy(source="x", rules={"patch.size": "ignore"}), "patch.size", "advise")
    assert settings_for_path(POLICY, "legacy/x.py").overrides == ("v.yaml:3",)


def test_a_waiver_turns_a_finding_into_info_that_says_who_and_until_when() -> None:
    [waived, kept] = judge(POLICY, [finding("code.syntax", "legacy/t.py"), finding("code.syntax", "src/t.py")])
    assert waived.severity == "info" and waived.details["waived_by"]["owner"] == "ada.okafor"
    assert waived.details["waived_severity"] == "block" and kept.severity == "block"


def test_a_fixed_rule_blocks_whatever_the_policy_or_a_waiver_says() -> None:
    policy = Policy(source="x", waivers=(Waiver("run.incomplete", "**", "r", "o", "2999-12-31"),))
    [judged] = judge(policy, [finding("run.incomplete", None, severity="warn")])
    assert judged.severity == "block"


def test_a_capped_finding_never_blocks() -> None:
    assert capped(finding("tests.weakened", max_severity="warn")).severity == "warn"
    assert capped(finding("tests.weakened")).severity == "block"
    [judged] = judge(POLICY, [finding("tests.weakened", max_severity="warn")])
    assert judged.severity == "warn"


def test_errors_and_info_pass_unchanged() -> None:
    judged = judge(POLICY, [finding("tests.failing", severity="error"), finding("tests.failing", severity="info")])
    assert [f.severity for f in judged] == ["error", "info"]


@pytest.mark.parametrize(
    ("severities", "verdict", "code"),
    [
        ((), "pass", ExitCode.PASS),
        (("info",), "pass", ExitCode.PASS),
        (("warn", "info"), "warn", ExitCode.PASS),
        (("warn", "error"), "error", ExitCode.UNVERIFIED),
        (("error", "block", "warn"), "block", ExitCode.BLOCK),
    ],
)
def test_the_decision_and_its_exit_code(severities: tuple[str, ...], verdict: str, code: ExitCode) -> None:
    decided = decide(finding("x", severity=s) for s in severities)
    assert decided == verdict and exit_code(decided) == code
    # the exit codes the hooks and CI read (README: 0 pass or warn, 1 block, 2 usage, 3 could not verify)
    assert (ExitCode.PASS, ExitCode.BLOCK, ExitCode.USAGE, ExitCode.UNVERIFIED) == (0, 1, 2, 3)
