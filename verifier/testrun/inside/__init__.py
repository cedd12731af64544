"""The harness that runs inside the sandbox, shipped as ordinary files of the package.

The gate copies these modules into the sandbox workspace under a folder named with a random token per
run (so the tree under test can neither know nor shadow their names) and starts :mod:`supervisor` with
Python's isolated mode. They use the standard library, pytest and coverage.py only: the verifier
package itself is not installed in the sandbox images. They never import each other by package name;
:mod:`session` imports the recorder plugin by the module name the supervisor hands it.

- :mod:`supervisor`: the sandbox's first process; starts pytest as a child, reads the records the
  plugin streams over a pipe, converts coverage.py's data file to plain JSON, and seals everything with
  a key only it holds.
- :mod:`session`: the child; sets ``sys.path`` (the tree's folders after the standard library and the
  installed packages), runs pytest under coverage.py, and reports how the session ended.
- :mod:`recorder`: the pytest plugin; one record per test phase, coverage contexts per test, the
  selection filter.
"""
