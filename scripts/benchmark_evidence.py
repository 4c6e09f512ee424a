"""`python scripts/benchmark_evidence.py [key=value ...]`: the same as `plantation benchmark-evidence [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["benchmark-evidence", *sys.argv[1:]]))
