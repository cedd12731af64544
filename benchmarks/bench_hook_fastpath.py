"""The commit hook's common case: `verifier check --staged` on a message without the trailer, against a bare
`python -c pass` (the bar: at most 1.5x). Prints the ratio measured side by side in one run."""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

from timing import compare, run_command


def main() -> None:
    with tempfile.TemporaryDirectory() as folder:
        message = Path(folder) / "MSG"
        message.write_text("Fix the invoice rounding\n\nSigned-off-by: Ada Okafor <ada@quillfeather.example>\n")
        # The console script pip installed beside this interpreter (not a version manager's shim on PATH).
        script = Path(sys.executable).parent / "verifier"
        gate = [str(script)] if script.exists() else [sys.executable, "-m", "verifier"]
        result = compare(
            "verifier check --staged (no trailer)",
            run_command([*gate, "check", "--staged", "--message-file", str(message), "--quiet"], cwd=folder),
            "python -c pass",
            run_command([sys.executable, "-c", "pass"]),
            runs=30,
            warmup=3,
        )
    print(result.describe())
    print(f"bar: at most 1.5x -> {'met' if result.ratio <= 1.5 else 'NOT met'}")


if __name__ == "__main__":
    main()
