"""Scratch repositories built with real git: for the demo, the tests and the benchmarks.

A thin, explicit wrapper over ``git`` subprocesses with a fixed identity and optional fixed dates, so
that histories are reproducible. It writes only inside the folder it is given.
"""

from __future__ import annotations

import os
import subprocess
from collections.abc import Mapping
from pathlib import Path

IDENTITY = {
    "GIT_AUTHOR_NAME": "Ada Okafor",
    "GIT_AUTHOR_EMAIL": "ada.okafor@quillfeather.example",
    "GIT_COMMITTER_NAME": "Ada Okafor",
    "GIT_COMMITTER_EMAIL": "ada.okafor@quillfeather.example",
}


class ScratchRepo:
    """A git repository in ``path`` that can be written and committed to in a few calls."""

    def __init__(self, path: str | os.PathLike[str], init: bool = True) -> None:
        self.path = Path(path)
        if init:
            self.path.mkdir(parents=True, exist_ok=True)
            self.git("init", "-q", "-b", "main")
            self.git("config", "user.name", IDENTITY["GIT_AUTHOR_NAME"])
            self.git("config", "user.email", IDENTITY["GIT_AUTHOR_EMAIL"])
            self.git("config", "commit.gpgsign", "false")

    def git(self, *args: str, env: Mapping[str, str] | None = None, input: bytes | None = None) -> str:
        """Run git in the repository; raise with git's message when it fails."""
        done = subprocess.run(
            ["git", *args],
            cwd=self.path,
            capture_output=True,
            input=input,
            env={**os.environ, **IDENTITY, **(env or {})},
            check=False,
        )
        if done.returncode != 0:
            raise RuntimeError(f"git {' '.join(args)}: {done.stderr.decode(errors='replace')}")
        return done.stdout.decode("utf-8", "replace")

    def write(self, files: Mapping[str, str | bytes]) -> None:
        for name, content in files.items():
            target = self.path / name
            target.parent.mkdir(parents=True, exist_ok=True)
            if isinstance(content, bytes):
                target.write_bytes(content)
            else:
                target.write_text(content, encoding="utf-8")

    def commit(
        self,
        message: str,
        files: Mapping[str, str | bytes] | None = None,
        date: str | None = None,
        remove: tuple[str, ...] = (),
        author: tuple[str, str] | None = None,
    ) -> str:
        """Write ``files``, remove ``remove``, commit everything with ``message``; return the new sha."""
        self.write(files or {})
        for name in remove:
            self.git("rm", "-q", "--", name)
        self.git("add", "-A")
        env = {"GIT_AUTHOR_DATE": date, "GIT_COMMITTER_DATE": date} if date else {}
        if author:
            env |= {"GIT_AUTHOR_NAME": author[0], "GIT_AUTHOR_EMAIL": author[1]}
        self.git("commit", "-q", "--allow-empty", "-F", "-", env=env, input=message.encode())
        return self.head()

    def head(self) -> str:
        return self.git("rev-parse", "HEAD").strip()
