"""`python -m augsplit ...` and the `augsplit` script: the command line (augsplit.cli).

`run` loads the command line's module inside the Ctrl-C handling, so a Ctrl-C while it loads
(about 13 ms: argparse, json, the module itself) ends in one line and exit 130, as one while a
command runs does (`cli.main`)."""

import sys


def run() -> int:
    try:
        from augsplit.cli import main
    except KeyboardInterrupt:
        print("augsplit: interrupted", file=sys.stderr)
        return 130
    return main()


if __name__ == "__main__":
    sys.exit(run())
