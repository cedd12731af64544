"""Which commits a model wrote: the ``Model-Written`` trailer, else one of the policy's agent identities."""

from __future__ import annotations

import re
from collections.abc import Iterable
from dataclasses import dataclass

from verifier.audit.model import LogCommit


@dataclass(frozen=True)
class Authorship:
    agent: str
    scope: tuple[str, ...]
    marked: bool


def authorship(commit: LogCommit, agent_emails: Iterable[str]) -> Authorship | None:
    """Who wrote ``commit``: its Model-Written trailer, else an author, committer or co-author whose
    email is one of the policy's agent identities; None for a person's commit."""
    from verifier.provenance.trailers import machine_mark, parse_trailers

    if "model-written" in commit.message.lower():  # a cheap test first: most commits carry no trailer
        mark = machine_mark(commit.message)
        if mark is not None:
            return Authorship(mark.agent, mark.scope, True)
    emails = set(agent_emails)
    if not emails:
        return None
    for email in (commit.author_email, commit.committer_email):
        if email.lower() in emails:
            return Authorship(email.lower(), (), False)
    if "co-authored-by" in commit.message.lower():
        for key, value in parse_trailers(commit.message):
            found = re.search(r"<([^>]+)>", value)
            if key.lower() == "co-authored-by" and found and found.group(1).lower() in emails:
                return Authorship(found.group(1).lower(), (), False)
    return None
