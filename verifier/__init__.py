"""verifier: a test-driven gate for machine-written patches.

The public API is :func:`verifier.pipeline.verify`; the command line in :mod:`verifier.cli.main` is a thin
layer over it. Nothing heavy is imported here, so that the commit hook's fast path stays fast.
"""

__version__ = "0.1.0"
