"""``secrets.literal``: credentials written into machine-written lines (never repeated in full in a finding)."""

from __future__ import annotations

import ast
import math
import re
from collections import Counter
from collections.abc import Iterator

from verifier.astnames import PIECES, constant_string, module_index, span
from verifier.models import Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import mask, option

RULE_ID = "secrets.literal"

# Token shapes published by their issuers (from memory of their documentation: AWS access key ids,
# GitHub's token prefixes, Slack's token prefixes, RFC 7519's JWT compact form, PEM armour of RFC 7468).
SHAPES: tuple[tuple[str, re.Pattern[str]], ...] = (
    ("private key block", re.compile(r"-----BEGIN ((RSA|DSA|EC|OPENSSH|ENCRYPTED|PGP) )?PRIVATE KEY( BLOCK)?-----")),
    ("AWS access key id", re.compile(r"\b((?:AKIA|ASIA)[A-Z0-9]{16})\b")),
    ("GitHub token", re.compile(r"\b(gh[pousr]_[A-Za-z0-9]{36,251}|github_pat_[A-Za-z0-9_]{50,})\b")),
    ("Slack token", re.compile(r"\b(xox[abposr]-[A-Za-z0-9-]{10,})")),
    ("JSON Web Token", re.compile(r"\b(eyJ[A-Za-z0-9_-]{8,}\.eyJ[A-Za-z0-9_-]{8,}\.[A-Za-z0-9_-]{8,})")),
)
_SECRET_NAME = r"[A-Za-z0-9_.-]*(?:key|token|secret|passw(?:or)?d|passwd|pwd|credential|auth)[A-Za-z0-9_]*"
ASSIGNED = re.compile(r"(?i)\b(" + _SECRET_NAME + r")[\"']?\s*(?:=|:=|:|=>)\s*[rbuRBU]?([\"'])([^\"'\s]+)\2")
# Values that say they are not real: documentation examples (AWS's end in EXAMPLE), templates, stars.
_PLACEHOLDERS = re.compile(r"(?i)example|dummy|changeme|placeholder|xxxx|your[_-]|redacted|\$\{|\{\{|<|\*\*\*")


# Every shape and name above contains one of these; a line without any is skipped cheaply.
_PREFILTER = re.compile(
    r"(?i)-----BEGIN|AKIA|ASIA|gh[pousr]_|github_pat_|xox|eyJ|key|token|secret|passw|pwd"
    r"|credential|auth"
)
# The same alternatives as plain lower-case texts: for ASCII text, ``text.lower()`` holding one of them
# is what the case-insensitive search finds, at a fraction of its cost (a regex alternation ignoring case
# tries every branch at every character).
_PREFILTER_TEXTS = (
    "-----begin",
    "akia",
    "asia",
    "ghp_",
    "gho_",
    "ghu_",
    "ghs_",
    "ghr_",
    "github_pat_",
    "xox",
    "eyj",
    "key",
    "token",
    "secret",
    "passw",
    "pwd",
    "credential",
    "auth",
)


def might_hold_secret(text: str) -> bool:
    """False when ``text`` cannot hold anything :func:`find_secrets` reports (the pre-filter)."""
    if not text.isascii():  # case folding outside ASCII is the regex's business (e.g. the Kelvin sign is k)
        return _PREFILTER.search(text) is not None
    lowered = text.lower()
    return any(part in lowered for part in _PREFILTER_TEXTS)


def entropy(text: str) -> float:
    """Shannon entropy in bits per character of ``text``."""
    counts = Counter(text)
    return -sum(c / len(text) * math.log2(c / len(text)) for c in counts.values()) if text else 0.0


def find_secrets(
    line: str, min_length: int, min_entropy: float, allowed: list[re.Pattern[str]]
) -> list[tuple[str, str]]:
    """(kind, secret) for each credential-like literal in ``line``."""
    found: list[tuple[str, str]] = []
    if not might_hold_secret(line):
        return found
    for kind, shape in SHAPES:
        for match in shape.finditer(line):
            found.append((kind, match.group(1) if shape.groups and kind != "private key block" else match.group(0)))
    for match in ASSIGNED.finditer(line):
        value = match.group(3)
        if len(value) >= min_length and entropy(value) >= min_entropy:
            found.append((f"high-entropy string assigned to '{match.group(1)}'", value))
    return [
        (kind, secret)
        for kind, secret in _one_per_literal(found)
        if not _PLACEHOLDERS.search(secret) and not any(a.search(secret) for a in allowed)
    ]


def _one_per_literal(found: list[tuple[str, str]]) -> list[tuple[str, str]]:
    """One finding per literal: a token of a known shape assigned to ``token = ...`` is found by its shape
    and again as a high-entropy assignment; the first (the more specific shape) is kept."""
    kept: list[tuple[str, str]] = []
    for kind, secret in found:
        if not any(secret in other or other in secret for _kind, other in kept):
            kept.append((kind, secret))
    return kept


@rule(
    RULE_ID,
    default="block",
    summary="credential-like literals on machine-written lines",
    stage="static",
    options={"allow": [], "min_length": 16, "min_entropy": 3.5},
    sources=(
        "CWE-798",
        "CWE-321",
        "RFC 7468 (PEM armour)",
        "RFC 7519 (JWT compact serialisation)",
        "AWS documentation: access key id format",
        "GitHub documentation: token prefixes",
    ),
)
def literal_secrets(context: RuleContext) -> Iterator[Finding]:
    """A credential in the source is a credential leaked to everyone who can read the repository, and
    a model may copy one from its context. Machine-written lines are searched for private key blocks,
    tokens of well-known shapes (AWS access key ids, GitHub and Slack tokens, JSON Web Tokens) and
    high-entropy strings assigned to names like key, token, secret or password. Findings show only a
    masked prefix. Remove the secret, revoke it (it is in git's history now), and read it from the
    environment or a secret store. Option ``allow`` lists regexes of values that are known fakes."""
    allowed = [re.compile(p) for p in option(context, RULE_ID, "allow")]
    min_length = option(context, RULE_ID, "min_length")
    min_entropy = option(context, RULE_ID, "min_entropy")
    for path, lines in context.provenance.machine_lines.items():
        source = context.head_sources.get(path)
        if source is None:
            continue
        found: list[tuple[int, str, str]] = []  # (line, kind, secret), one per secret
        for number, text in _texts(path, source, frozenset(lines)):
            for kind, secret in find_secrets(text, min_length, min_entropy, allowed):
                if not any(secret in other or other in secret for _, _, other in found):
                    found.append((number, kind, secret))
        for number, kind, secret in sorted(found, key=lambda item: item[0]):
            cwe = "CWE-321" if kind == "private key block" else "CWE-798"
            yield Finding(
                RULE_ID,
                "block",
                f"{kind} in a machine-written line: {mask(secret)} ({cwe})",
                path=path,
                line=number,
                details={"kind": kind, "cwe": cwe, "masked": mask(secret)},
            )


def _texts(path: str, source: str, lines: frozenset[int]) -> Iterator[tuple[int, str]]:
    """The texts to search: each machine-written line, then (for Python) each string the source builds from
    pieces (adjacent literals, ``+``, ``"".join``, f-strings without fields) touching those lines, given as
    ``name = "value"`` when it is assigned, passed by keyword or stored under a key, so that the name rule
    sees the joined value."""
    rows = source.split("\n")
    if might_hold_secret(source):
        for number in sorted(lines):
            if 0 < number <= len(rows):
                yield number, rows[number - 1]
    if path.endswith(".py") and PIECES.search(source):
        yield from _joined_strings(source, path, lines)


def _joined_strings(source: str, path: str, lines: frozenset[int]) -> Iterator[tuple[int, str]]:
    index = module_index(source, path)
    if index is None:
        return
    named: dict[int, str] = {}  # id of a value node -> the name it is given
    for node in ast.walk(index.tree):
        if isinstance(node, ast.Assign):
            for target in node.targets:
                if isinstance(target, (ast.Name, ast.Attribute)):
                    named[id(node.value)] = target.id if isinstance(target, ast.Name) else target.attr
        elif isinstance(node, ast.AnnAssign) and node.value is not None and isinstance(node.target, ast.Name):
            named[id(node.value)] = node.target.id
        elif isinstance(node, ast.keyword) and node.arg:
            named[id(node.value)] = node.arg
        elif isinstance(node, ast.Dict):
            for key, value in zip(node.keys, node.values, strict=True):
                if isinstance(key, ast.Constant) and isinstance(key.value, str):
                    named[id(value)] = key.value
    for node in ast.walk(index.tree):
        if not isinstance(node, (ast.Constant, ast.BinOp, ast.JoinedStr, ast.Call)):
            continue
        if not any(n in lines for n in span(node)):
            continue
        pieced = isinstance(node, (ast.BinOp, ast.JoinedStr, ast.Call)) or (node.end_lineno or 0) > node.lineno
        if not pieced and id(node) not in named:
            continue  # a one-line literal: the line itself was searched
        text = constant_string(node)
        if text is None or not might_hold_secret(text + named.get(id(node), "")):
            continue
        name = named.get(id(node))
        yield node.lineno, f'{name} = "{text}"' if name else text
