"""``python -m thickbake``: the same entry point as the ``thickbake`` command."""

import sys

try:
    from thickbake.cli import main
except KeyboardInterrupt:  # Ctrl-C while the command line was still being imported
    print("thickbake: interrupted", file=sys.stderr)
    sys.exit(130)

sys.exit(main())
