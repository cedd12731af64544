"""What the installed hooks cost on an unmarked commit (the common case), as ratios measured side by side.

1. The installed commit-msg hook on an unmarked message, against a bare ``python -c pass``.
2. The hook's Python entry (``verifier hook commit-msg``) on a message that names the trailer key in its
   body but carries no trailer, so the shim's text pre-check lets it through: against ``python -c pass``.
3. ``git commit`` of an unmarked message in a repository with the hooks installed, against the same
   ``git commit`` in an identical repository without them.

Run: ``python benchmarks/bench_hooks.py`` (from the checkout; it installs hooks in temporary repositories).
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
from pathlib import Path

from timing import compare, run_command

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from verifier.demo.scratch import IDENTITY, ScratchRepo  # noqa: E402

UNMARKED = "Fix the invoice rounding\n\nSigned-off-by: Ada Okafor <ada@quillfeather.example>\n"
NAMES_THE_KEY = "Explain the Model-Written trailer in the docs\n\nNo trailer here, only prose.\n"
ENTRY = "import sys; sys.path[0] = sys.argv.pop(1); from verifier.cli.main import main; sys.exit(main())"


def committer(repo: Path, env: dict[str, str]):  # type: ignore[no-untyped-def]
    return run_command(["git", "commit", "-q", "--allow-empty", "-m", "Fix the invoice rounding"], cwd=repo, env=env)


def main() -> None:
    env = {**os.environ, **IDENTITY, "PYTHONPATH": str(ROOT)}
    with tempfile.TemporaryDirectory() as folder:
        base = Path(folder)
        hooked, plain = ScratchRepo(base / "hooked"), ScratchRepo(base / "plain")
        for repo in (hooked, plain):
            repo.commit("Start", {"README.md": "parcelkit\n"})
        subprocess.run(
            [sys.executable, "-m", "verifier", "hooks", "install"],
            cwd=hooked.path,
            env=env,
            check=True,
            capture_output=True,
        )
        unmarked, names_key = base / "MSG1", base / "MSG2"
        unmarked.write_text(UNMARKED)
        names_key.write_text(NAMES_THE_KEY)
        hook = hooked.path / ".git" / "hooks" / "commit-msg"
        bare = run_command([sys.executable, "-c", "pass"])
        results = [
            compare(
                "commit-msg hook, unmarked message",
                run_command([str(hook), str(unmarked)], cwd=hooked.path),
                "python -c pass",
                bare,
                runs=40,
                warmup=3,
            ),
            compare(
                "verifier hook commit-msg (Python path, no trailer)",
                run_command(
                    [sys.executable, "-c", ENTRY, str(ROOT), "hook", "commit-msg", str(names_key)], cwd=hooked.path
                ),
                "python -c pass",
                bare,
                runs=40,
                warmup=3,
            ),
            compare(
                "git commit with the hooks",
                committer(hooked.path, env),
                "git commit without hooks",
                committer(plain.path, env),
                runs=40,
                warmup=3,
            ),
        ]
    for result in results:
        print(result.describe())


if __name__ == "__main__":
    main()
