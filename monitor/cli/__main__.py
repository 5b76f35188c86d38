"""``python -m monitor.cli``: the ``gasgap`` command."""

import sys

from monitor.cli import main

sys.exit(main())
