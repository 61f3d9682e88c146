"""The ``pellucid`` command (sub-commands are added as the batch runner lands)."""

from __future__ import annotations

import argparse
import sys

from . import __version__


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="pellucid", description=__doc__)
    parser.add_argument("--version", action="version", version=f"pellucid {__version__}")
    parser.parse_args(argv)
    return 0


if __name__ == "__main__":
    sys.exit(main())
