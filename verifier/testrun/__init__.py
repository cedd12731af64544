"""The test-run stage: the harness that runs pytest with coverage in the sandbox, and reading its results."""
