"""``python -m shadow`` is the ``shadow`` command."""

import sys

from shadow.cli import main

sys.exit(main())
