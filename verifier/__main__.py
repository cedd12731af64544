"""``python -m verifier``: the same as the ``verifier`` command."""

import sys

from verifier.cli.main import main

sys.exit(main())
