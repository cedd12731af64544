"""The mutation stage: small faulty versions of machine-written lines, each run against the tests that ran it.

``operators`` makes the mutants of one line (syntax-tree level, each one compiles), ``plan`` picks which
lines and how many mutants per line, ``inside/`` is the runner shipped into the sandbox, ``stage`` runs it
through a sandbox backend and caches the outcomes by content.
"""
