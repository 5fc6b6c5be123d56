"""``python -m thickbake``: the same entry point as the ``thickbake`` command."""

import sys

from thickbake.cli import main

sys.exit(main())
