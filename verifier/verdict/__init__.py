"""The verdict stage: raw findings, judged by the trusted policy, become pass, warn, block or error.

Read in order: :mod:`~verifier.verdict.settings` (the policy as it applies to one path),
:mod:`~verifier.verdict.waivers` (which waiver covers a finding), :mod:`~verifier.verdict.judge` (each
finding's severity: the rule's setting at its path, a waiver, the rule's cap) and
:mod:`~verifier.verdict.decision` (the findings' verdict and the exit code). The rules only report what
they see; nothing before this stage decides how much a finding weighs.
"""
