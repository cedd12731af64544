"""The test-run stage: the harness that runs pytest with coverage in the sandbox, and reading its results.

``harness`` puts the in-sandbox harness (``inside/``, shipped as package files) into a tree and reads the
sealed result; ``integrity`` holds the host's checks of the records; ``measure`` judges coverage against
coverage.py's analysis of the committed source; ``differential`` runs the selected tests at base too.
"""
