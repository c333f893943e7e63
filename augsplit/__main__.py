"""`python -m augsplit ...` runs the command line, as the `augsplit` script does."""

import sys

from augsplit.cli import main

if __name__ == "__main__":
    sys.exit(main())
