"""``python -m atomline.flows.cli``: the ``atomline`` command."""

import sys

from . import main

sys.exit(main())
