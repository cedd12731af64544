"""``paths.protected``: machine-written changes to files that decide how code is built, checked or shipped."""

from __future__ import annotations

from collections.abc import Iterator

from verifier.models import Finding
from verifier.rules import RuleContext, rule
from verifier.rules.machine import glob_matcher, machine_lines, machine_removed, option

RULE_ID = "paths.protected"

DEFAULT_PROTECTED: tuple[str, ...] = (
    # continuous integration
    ".github/workflows/**",
    ".github/actions/**",
    ".gitlab-ci.yml",
    ".gitlab/ci/**",
    ".ci/**",
    "Jenkinsfile",
    "**/Jenkinsfile",
    ".circleci/**",
    "azure-pipelines.yml",
    ".buildkite/**",
    ".travis.yml",
    ".drone.yml",
    # the gate's own policy
    "verifier.yaml",
    "policies/**",
    # git hooks and ownership
    ".githooks/**",
    "hooks/**",
    ".github/CODEOWNERS",
    "CODEOWNERS",
    # deployment
    "Dockerfile",
    "**/Dockerfile",
    "**/Dockerfile.*",
    "**/*.dockerfile",
    "docker-compose*.yml",
    "deploy/**",
    "k8s/**",
    "helm/**",
    "**/*.tf",
    "**/*.tfvars",
    # lock files (pinned, hashed dependency sets)
    "**/poetry.lock",
    "**/Pipfile.lock",
    "**/uv.lock",
    "**/pdm.lock",
    "**/package-lock.json",
    "**/yarn.lock",
    "**/pnpm-lock.yaml",
    "**/Cargo.lock",
    "**/requirements*.lock",
    # database migrations
    "**/migrations/**",
    "**/alembic/versions/**",
)


@rule(
    RULE_ID,
    default="block",
    summary="machine-written change to CI, policy, hooks, deployment, locks, migrations",
    stage="static",
    options={"paths": list(DEFAULT_PROTECTED), "extra": []},
    sources=("the gate's trust model: a change must not edit what builds, judges or ships it",),
)
def protected_paths(context: RuleContext) -> Iterator[Finding]:
    """Some files decide how every other change is built, checked, deployed or migrated: CI
    configuration, this gate's policy (verifier.yaml, every file it builds on, policies/), git hooks,
    deployment files (Dockerfile, deploy/, k8s/, Terraform), lock files and database migrations. A model
    must not change them: any machine-written line added or removed there, or a machine commit adding,
    deleting or renaming such a file, is reported. Have a human make (or re-make) the change in a commit
    of their own. Teams list more globs in option ``extra`` (or replace the defaults with option
    ``paths``)."""
    globs = glob_matcher((*option(context, RULE_ID, "paths"), *option(context, RULE_ID, "extra")))
    policy_files = frozenset(context.policy.files)  # what the trusted policy builds on, protected like itself

    def is_protected(path: str) -> bool:
        return path in policy_files or globs(path)

    for file in context.change.files:
        names = [p for p in dict.fromkeys((file.path, file.old_path)) if p]
        protected = next((p for p in names if is_protected(p)), None)
        if protected is None:
            continue
        added = sorted(machine_lines(context, file.path))
        if added:
            yield Finding(
                RULE_ID,
                "block",
                f"protected file changed by machine-written lines ({len(added)} added)",
                path=file.path,
                line=added[0],
                details={"lines": added},
            )
        elif machine_removed(context, file):
            what = {"added": "added", "deleted": "deleted", "renamed": f"renamed from {file.old_path}"}
            yield Finding(
                RULE_ID,
                "block",
                f"protected file {what.get(file.status, 'edited')} by a machine commit",
                path=file.path,
                details={"status": file.status, "removed_lines": len(file.removed_lines)},
            )
