"""`python -m service`: the same command line as `bioparity` (service.cli.main)."""

from __future__ import annotations

import sys

from service.cli.main import main

if __name__ == "__main__":
    sys.exit(main(prog="python -m service"))
