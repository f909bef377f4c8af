"""``python -m gcmc.cli COMMAND ...``, the same as the ``gcmc`` command."""

import sys

from gcmc.cli.app import main

sys.exit(main())
