"""``python -m stablefilt``: the ``stablefilt`` command."""

import sys

from ._launch import main

sys.exit(main())
