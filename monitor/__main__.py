"""`python -m monitor` is the same as the `bandwatch` command."""

import sys

from .commands.cli import main

if __name__ == "__main__":
    sys.exit(main())
