"""The policy stage: validation with file, line, column and key; layering; options; the shipped policies."""

from __future__ import annotations

from datetime import date
from pathlib import Path

import pytest

from verifier.demo.scratch import ScratchRepo
from verifier.errors import PolicyError
from verifier.gitio import Git
from verifier.models import Finding, PathOverride, Policy, Waiver
from verifier.policy.loader import (
    Layer,
    build_policy,
    load_policy,
    load_policy_file,
    parse_layer,
    shipped_dir,
    shipped_layer,
    shipped_policies,
)
from verifier.policy.notices import replaced_lists
from verifier.rules import REGISTRY, Rule
from verifier.rules.catalog import load_all
from verifier.verdict.judge import judge_finding
from verifier.verdict.settings import settings_for_path
from verifier.verdict.waivers import waiver_notes, waivers_used


def error_of(text: str) -> PolicyError:
    with pytest.raises(PolicyError) as caught:
        parse_layer(text, "verifier.yaml")
    return caught.value


def position(text: str, needle: str, occurrence: int = 1) -> tuple[int, int]:
    """1-based line and column of ``needle`` in ``text``, counted from the text itself (not from YAML)."""
    index = -1
    for _ in range(occurrence):
        index = text.index(needle, index + 1)
    line = text.count("\n", 0, index) + 1
    return line, index - (text.rfind("\n", 0, index) + 1) + 1


@pytest.fixture
def sample_rule(monkeypatch: pytest.MonkeyPatch) -> Rule:
    """A rule with one option of each kind, registered for one test (stage 'none' never runs)."""
    load_all()
    options = {"limit": 400, "ratio": 0.5, "strict": False, "label": "x", "globs": ["a/**"], "entries": []}
    sample = Rule("sample.options", "advise", "a sample", "explains", "none", lambda _c: [], False, options)
    monkeypatch.setitem(REGISTRY, sample.id, sample)
    return sample


def test_unknown_key_names_file_line_column_and_key() -> None:
    text = "version: 1\ncoverage:\n  threshold: 80\n  treshold: 70\n"
    error = error_of(text)
    assert (error.source, error.line, error.column, error.key) == ("verifier.yaml", 4, 3, "coverage.treshold")
    assert (error.line, error.column) == position(text, "treshold")
    assert str(error).startswith("verifier.yaml:4: key 'coverage.treshold': unknown key")
    assert "did you mean 'threshold'?" in str(error) and str(error).endswith("(column 3)")


@pytest.mark.parametrize(
    ("text", "needle", "key"),
    [
        ("coverage: {threshold: 80, treshold: 70}\n", "treshold", "coverage.treshold"),
        (
            'paths:\n  "legacy/**":\n    coverage: {thresold: 5}\n',
            "thresold",
            "paths.legacy/**.coverage.thresold",
        ),
        ("paths:\n  a: {}\n  b:\n    ruels: {}\n", "ruels", "paths.b.ruels"),
        (
            "waivers:\n  - rule: code.syntax\n    path: a\n    reason: r\n    owner: o\n    expires: 2999-01-01\n"
            "    ticket: 12\n",
            "ticket",
            "waivers[0].ticket",
        ),
        ("rules:\n  code.syntax: {severity: advise, level: 3}\n", "level", "rules.code.syntax.level"),
        ("rules:\n  code.sintax: advise\n", "code.sintax", "rules.code.sintax"),
        ("sandbox:\n  allow_process: false\n  network: true\n", "network", "sandbox.network"),
    ],
)
def test_unknown_keys_anywhere_are_located(text: str, needle: str, key: str) -> None:
    error = error_of(text)
    assert error.key == key
    assert (error.line, error.column) == position(text, needle)


@pytest.mark.parametrize(
    ("text", "line", "key"),
    [
        ("coverage:\n  threshold: lots\n", 2, "coverage.threshold"),
        ("coverage:\n  threshold: 101\n", 2, "coverage.threshold"),
        ("tests:\n  paths: tests\n", 2, "tests.paths"),
        ("version: 2\n", 1, "version"),
        ("sandbox:\n  allow_process: maybe\n", 2, "sandbox.allow_process"),
        ("rules:\n  tests.failing: loud\n", 2, "rules.tests.failing"),
        ("rules:\n  no.such-rule: advise\n", 2, "rules.no.such-rule"),
        ("rules:\n  run.incomplete: advise\n", 2, "rules.run.incomplete"),  # a fixed rule always blocks
        ("builds_on: lenient\n", 1, "builds_on"),
        ("limits: 5\n", 1, "limits"),
        ("paths:\n  - legacy/**\n", 2, "paths"),  # a mapping of glob to settings, not a list
        ("paths:\n  legacy/**: 50\n", 2, "paths.legacy/**"),
        ('paths:\n  "": {}\n', 2, "paths."),
        ("waivers:\n  - {rule: code.syntax, path: a}\n", 2, "waivers[0]"),  # reason, owner, expires missing
        (
            "waivers:\n  - {rule: code.syntax, path: a, reason: r, owner: o, expires: 2999-02-30}\n",
            2,
            "waivers[0].expires",
        ),
        (
            "waivers:\n  - {rule: code.syntax, path: a, reason: r, owner: o, expires: next year}\n",
            2,
            "waivers[0].expires",
        ),
        (
            "waivers:\n  - {rule: code.syntax, path: a, reason: '  ', owner: o, expires: 2999-01-01}\n",
            2,
            "waivers[0].reason",
        ),
        (
            "waivers:\n  - {rule: run.incomplete, path: a, reason: r, owner: o, expires: 2999-01-01}\n",
            2,
            "waivers[0].rule",
        ),  # the fail-closed rule cannot be waived
        ("waivers:\n  - {rule: no.rule, path: a, reason: r, owner: o, expires: 2999-01-01}\n", 2, "waivers[0].rule"),
        ("coverage:\n  threshold: 80\n  threshold: 70\n", 3, "coverage.threshold"),  # given twice
    ],
)
def test_bad_values_are_located(text: str, line: int, key: str) -> None:
    error = error_of(text)
    assert (error.line, error.key) == (line, key)


def test_broken_yaml_gives_its_line_and_column() -> None:
    error = error_of("version: 1\ncoverage: [unclosed\n")
    assert error.line is not None and error.line >= 2 and "not valid YAML" in error.problem
    assert error.column is not None


def test_bare_off_is_read_as_the_word_and_points_at_its_new_name() -> None:
    # YAML 1.1 reads a bare `off` as the boolean false (https://yaml.org/type/bool.html); a policy means the word.
    error = error_of("rules:\n  code.syntax: off\n")
    assert (error.key, error.line) == ("rules.code.syntax", 2)
    assert "the setting 'off' was renamed 'ignore'" in error.problem
    layer = parse_layer("rules:\n  code.syntax: ignore\n", "v.yaml")
    assert layer["rules"]["code.syntax"]["severity"].value == "ignore"


def test_rule_options_are_typed_by_their_defaults(sample_rule: Rule) -> None:
    text = (
        "rules:\n  sample.options:\n    severity: block\n    limit: 50\n    ratio: 1\n    strict: true\n"
        "    label: y\n    globs: [b/**]\n    entries: [{call: os.system, when: {shell: true}}]\n"
    )
    policy = build_policy([shipped_layer("default"), Layer("v.yaml", parse_layer(text, "v.yaml"))])
    assert policy.rules["sample.options"] == "block"
    assert policy.rule_options["sample.options"] == {
        "limit": 50,
        "ratio": 1.0,
        "strict": True,
        "label": "y",
        "globs": ["b/**"],
        "entries": [{"call": "os.system", "when": {"shell": True}}],
    }
    assert sample_rule.option(policy, "limit") == 50
    assert sample_rule.option(Policy(source="x"), "limit") == 400  # the rule's default


@pytest.mark.parametrize(
    ("option", "value"),
    [
        ("limit", "many"),
        ("limit", "2.5"),
        ("limit", "true"),
        ("ratio", "high"),
        ("strict", "1"),
        ("label", "[1]"),
        ("globs", "b/**"),
        ("globs", "[1, 2]"),
        ("entries", "[[1]]"),
        ("entries", "[{call: 2020-01-01}]"),
    ],
)
def test_wrongly_typed_options_are_located(sample_rule: Rule, option: str, value: str) -> None:
    text = f"rules:\n  sample.options:\n    {option}: {value}\n"
    error = error_of(text)
    assert error.key == f"rules.sample.options.{option}"
    line, column = position(text, f"{option}: {value}")
    assert (error.line, error.column) == (line, column + len(option) + 2)  # the value, after "option: "


def test_banned_call_entries_are_checked_by_their_rule_at_their_line() -> None:
    if "calls.banned" not in load_all():
        pytest.skip("the calls.banned rule is not in this build")
    good = (
        "      - call: acme.db.raw_sql\n        why: raw SQL built at run time\n"
        "        when: {arg: 0, is: non-literal}\n"
    )
    bad = "      - {call: parcelkit.legacy.run, cwe: 78}\n"
    text = "rules:\n  calls.banned:\n    entries:\n" + good + bad
    error = error_of(text)
    assert error.key == "rules.calls.banned.entries[1]" and (error.line, error.column) == position(text, "{call")
    assert "'why'" in error.problem and "CWE-89" in error.problem  # the rule's own wording (docs/rules.md)


def test_shipped_policies_are_valid_and_keep_their_settings() -> None:
    assert {"default", "strict"} <= set(shipped_policies())
    for name in shipped_policies():
        load_policy_file(shipped_dir() / f"{name}.yaml")
    default = load_policy_file(shipped_dir() / "default.yaml")
    assert default.coverage_threshold == 90.0
    assert default.rules == {
        "tests.failing": "block",
        "coverage.new-lines": "block",
        "code.syntax": "block",
        "tests.mutant-survived": "block",
    }
    assert default.rule_options["tests.mutant-survived"] == {"threshold": 80.0, "per_line": 3}


def test_missing_policy_file_is_a_policy_error(tmp_path: Path) -> None:
    with pytest.raises(PolicyError, match="cannot be read"):
        load_policy_file(tmp_path / "nope.yaml")


def test_layers_read_from_the_base_revision(tmp_path: Path) -> None:
    repo = ScratchRepo(tmp_path / "r")
    base = repo.commit("policy", {"verifier.yaml": "version: 1\nbuilds_on: strict\nlimits:\n  memory_mb: 512\n"})
    repo.commit("change the policy", {"verifier.yaml": "version: 1\ncoverage:\n  threshold: 1\n"})
    policy = load_policy(Git(repo.path), base)
    assert policy.coverage_threshold == 100.0  # from strict
    assert policy.limits.memory_mb == 512  # from the repository, at base
    assert policy.limits.wall_seconds == 300  # strict overrides the default's 600
    assert policy.source == f"shipped:strict.yaml + {base[:12]}:verifier.yaml"
    assert load_policy(Git(repo.path), None).source == "shipped default policy"


def test_rule_settings_merge_key_by_key_across_layers(sample_rule: Rule) -> None:
    lower = parse_layer("rules:\n  sample.options: {severity: block, limit: 10}\n", "org.yaml")
    upper = parse_layer("rules:\n  sample.options: {ratio: 0.9}\n", "repo.yaml")
    policy = build_policy([shipped_layer("default"), Layer("org.yaml", lower), Layer("repo.yaml", upper)])
    assert policy.rules["sample.options"] == "block"  # the upper layer did not restate it
    assert policy.rule_options["sample.options"] == {"limit": 10, "ratio": 0.9}


# --- per-path settings and waivers on plain data --------------------------------------------------------

LEGACY = PathOverride(
    paths=("legacy/**",),
    source="v.yaml:3",
    coverage_threshold=50.0,
    rules={"code.syntax": "advise"},
    rule_options={"sample.options": {"limit": 5}},
)
TOOLS = PathOverride(paths=("legacy/tools/**",), source="v.yaml:9", rules={"code.syntax": "ignore"})


def test_policy_for_path_applies_matching_overrides_in_order() -> None:
    policy = Policy(source="x", coverage_threshold=90.0, rules={"code.syntax": "block"}, overrides=(LEGACY, TOOLS))
    assert settings_for_path(policy, "parcelkit/rates.py").coverage_threshold == 90.0
    legacy = settings_for_path(policy, "legacy/old.py")
    assert (legacy.coverage_threshold, legacy.setting("code.syntax", "block")) == (50.0, "advise")
    assert legacy.option("sample.options", "limit", 400) == 5 and legacy.overrides == ("v.yaml:3",)
    tools = settings_for_path(policy, "legacy/tools/gen.py")
    assert tools.setting("code.syntax", "block") == "ignore" and tools.coverage_threshold == 50.0
    assert settings_for_path(policy, None).setting("code.syntax", "advise") == "block"  # change-wide: no override


def test_findings_take_the_severity_of_their_path() -> None:
    policy = Policy(source="x", rules={"code.syntax": "block"}, overrides=(LEGACY, TOOLS))

    def judged(path: str | None) -> str | None:
        result = judge_finding(policy, "code.syntax", "block", False, Finding("code.syntax", "block", "m", path=path))
        return None if result is None else result.severity

    assert [judged(p) for p in ("a.py", "legacy/a.py", "legacy/tools/a.py", None)] == ["block", "warn", None, "block"]
    fixed = judge_finding(policy, "code.syntax", "block", True, Finding("code.syntax", "warn", "m", path="legacy/a.py"))
    assert fixed is not None and fixed.severity == "block"  # a fixed rule ignores overrides


def test_a_matching_waiver_turns_a_finding_into_info() -> None:
    waiver = Waiver("code.syntax", "legacy/**", "generated, rewritten in Q3", "ada.okafor", "2999-12-31", "v.yaml:12")
    whole = Waiver("coverage.new-lines", "**", "release freeze", "ops", "2999-12-31", "v.yaml:18")
    policy = Policy(source="x", waivers=(waiver, whole))
    hit = judge_finding(policy, "code.syntax", "block", False, Finding("code.syntax", "block", "m", path="legacy/a.py"))
    miss = judge_finding(policy, "code.syntax", "block", False, Finding("code.syntax", "block", "m", path="src/a.py"))
    wide = judge_finding(policy, "coverage.new-lines", "block", False, Finding("coverage.new-lines", "block", "m"))
    assert hit is not None and hit.severity == "info" and hit.details["waived_by"]["owner"] == "ada.okafor"
    assert hit.details["waived_severity"] == "block"
    assert miss is not None and miss.severity == "block"
    assert wide is not None and wide.severity == "info"  # only "**" covers a finding without a path
    assert waivers_used(policy, [hit, miss]) == (waiver,)


def test_waiver_expiry_is_inclusive_and_a_lapsed_one_waives_nothing() -> None:
    text = (
        "version: 1\nwaivers:\n  - rule: code.syntax\n    path: legacy/**\n    reason: generated code\n"
        "    owner: ada.okafor\n    expires: 2030-06-30\n"
    )
    layers = [shipped_layer("default"), Layer("v.yaml", parse_layer(text, "v.yaml"))]
    last_day = build_policy(layers, today=date(2030, 6, 30))
    assert last_day.waivers[0].expires == "2030-06-30" and last_day.expired_waivers == ()
    lapsed = build_policy(layers, today=date(2030, 7, 1))
    assert lapsed.waivers == () and [w.source for w in lapsed.expired_waivers] == ["v.yaml:3"]
    on_its_path = Finding("code.syntax", "block", "invalid syntax", path="legacy/a.py")
    judged = judge_finding(lapsed, "code.syntax", "block", False, on_its_path)
    assert judged is not None and judged.severity == "block" and "waived_by" not in judged.details
    assert judged.message == (
        "invalid syntax (its waiver expired on 2030-06-30 (v.yaml:3); renew it with a later date or remove it)"
    )
    other_path = Finding("code.syntax", "block", "m", path="src/a.py")
    elsewhere = judge_finding(lapsed, "code.syntax", "block", False, other_path)
    assert elsewhere is not None and elsewhere.message == "m" and "waiver_expired" not in elsewhere.details
    [note] = waiver_notes(lapsed, date(2030, 7, 1))
    assert "'legacy/**'" in note and "v.yaml:3" in note and "expired on 2030-06-30" in note


@pytest.mark.parametrize(
    ("today", "warned", "days"),
    [
        (date(2030, 6, 15), False, ""),
        (date(2030, 6, 16), True, "(in 14 days)"),
        (date(2030, 6, 29), True, "(in 1 day)"),
        (date(2030, 6, 30), True, "(its last day is today)"),
    ],
)
def test_a_waiver_is_warned_about_from_fourteen_days_ahead(today: date, warned: bool, days: str) -> None:
    text = "version: 1\nwaivers:\n  - {rule: code.syntax, path: gen/**, reason: r, owner: o, expires: 2030-06-30}\n"
    policy = build_policy([shipped_layer("default"), Layer("v.yaml", parse_layer(text, "v.yaml"))], today=today)
    assert len(policy.waivers) == 1 and (policy.expiring_waivers == policy.waivers) is warned
    expected = (
        f"the waiver of code.syntax for 'gen/**' (owner o, v.yaml:3) expires on 2030-06-30 {days}: "
        "renew it or fix what it covers before then"
    )
    assert waiver_notes(policy, today) == ((expected,) if warned else ())


def test_replaced_lists_name_the_dropped_entries_of_every_layer_below() -> None:
    org = Layer("org.yaml", parse_layer("version: 1\nselection:\n  ignore_paths: ['**/*.md', 'site/**']\n", "org.yaml"))
    repo = Layer("v.yaml", parse_layer("version: 1\nselection:\n  ignore_paths: ['site/**']\n", "v.yaml"))
    found = replaced_lists([shipped_layer("default"), org, repo])
    assert [(r.key, r.where, r.replaced) for r in found] == [
        ("selection.ignore_paths", "org.yaml:3", f"shipped:default.yaml:{_line_of_default('  ignore_paths:')}"),
        ("selection.ignore_paths", "v.yaml:3", "org.yaml:3"),
    ]
    assert found[1].dropped == ("**/*.md",) and "site/**" not in found[0].dropped


def _line_of_default(needle: str) -> int:
    text = (shipped_dir() / "default.yaml").read_text()
    return text[: text.index(needle)].count("\n") + 1


# -- numbers and the size of messages ------------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("limits:\n  wall_seconds: .nan\n", "limits.wall_seconds"),
        ("limits:\n  memory_mb: .inf\n", "limits.memory_mb"),
        ("limits:\n  cpu_seconds: 100000000000000000000000000000\n", "limits.cpu_seconds"),
        ("coverage:\n  threshold: -.inf\n", "coverage.threshold"),
        ("selection:\n  reruns: .nan\n", "selection.reruns"),
        ("rules:\n  secrets.literal:\n    min_entropy: .nan\n", "rules.secrets.literal.min_entropy"),
        ("rules:\n  patch.size:\n    max_lines: 99999999999999999999\n", "rules.patch.size.max_lines"),
    ],
)
def test_policy_numbers_must_be_finite_and_in_range(text: str, key: str) -> None:
    # YAML 1.1 (PyYAML's SafeLoader) reads .nan and .inf as floats: the common way to write them
    error = error_of("version: 1\n" + text)
    assert error.key == key and error.line == text.count("\n") + 1  # the value's own line, after "version: 1"
    assert "expected" in error.problem and len(str(error)) < 300


def test_sensible_limits_are_accepted() -> None:
    layer = parse_layer("version: 1\nlimits:\n  wall_seconds: 3600\n  memory_mb: 65536\n", "verifier.yaml")
    assert layer["limits"]["wall_seconds"].value == 3600 and layer["limits"]["memory_mb"].value == 65536


def test_an_integer_of_thousands_of_digits_gets_a_short_message() -> None:
    error = error_of("version: 1\nlimits:\n  wall_seconds: " + "9" * 6000 + "\n")
    assert error.key == "limits.wall_seconds" and len(str(error)) < 300


ALIAS_BOMB = """version: 1
a: &a ["lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol"]
b: &b [*a, *a, *a, *a, *a, *a, *a, *a, *a]
c: &c [*b, *b, *b, *b, *b, *b, *b, *b, *b]
d: &d [*c, *c, *c, *c, *c, *c, *c, *c, *c]
e: &e [*d, *d, *d, *d, *d, *d, *d, *d, *d]
f: &f [*e, *e, *e, *e, *e, *e, *e, *e, *e]
g: &g [*f, *f, *f, *f, *f, *f, *f, *f, *f]
h: &h [*g, *g, *g, *g, *g, *g, *g, *g, *g]
tests:
  paths: [*h, *h, *h, *h, *h, *h, *h, *h, *h]
"""


def test_a_yaml_alias_bomb_is_refused_with_a_short_message() -> None:
    """Nine levels of nine aliases stand for 9**10 (about 3.5 billion) strings in ten lines."""
    error = error_of(ALIAS_BOMB)
    assert error.line is not None and "expands to more than" in error.problem
    assert len(str(error)) < 300


def test_a_small_alias_bomb_under_a_known_key_is_quoted_short() -> None:
    """Small enough to expand, wrong in type: the message quotes the value cut short."""
    text = 'version: 1\nx: &x ["a", "b", "c"]\ncoverage:\n  threshold: [*x, *x, *x, *x, *x, *x]\n'
    error = error_of(text.replace("x: &x", "tests:\n  paths: &x"))
    assert error.key == "coverage.threshold" and "..." in error.problem and len(str(error)) < 300


def test_a_list_as_a_key_is_refused_without_quoting_it() -> None:
    error = error_of("version: 1\ncoverage:\n  ? [a, b, c]\n  : 5\n")
    assert error.key == "coverage" and "plain word" in error.problem


def test_yaml_anchors_in_an_ordinary_policy_still_work() -> None:
    text = "version: 1\ntests:\n  paths: &tests [tests/]\ncoverage:\n  exclude: *tests\n"
    assert parse_layer(text, "verifier.yaml")["coverage"]["exclude"].value == ["tests/"]


def test_a_huge_key_is_quoted_short() -> None:
    error = error_of("version: 1\ncoverage:\n  ? " + "k" * 100_000 + "\n  : 5\n")  # '?': a key of any length
    assert error.key == "coverage" and "short word" in error.problem and len(str(error)) < 300
