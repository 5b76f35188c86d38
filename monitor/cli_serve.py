"""The service's commands moved to ``monitor.cli.serve``; this name is kept for
``python -m monitor.cli_serve`` in scripts and tests."""

import sys

from monitor.cli.serve import add_serve_commands, main

__all__ = ["add_serve_commands", "main"]

if __name__ == "__main__":
    sys.exit(main())
