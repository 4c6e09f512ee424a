"""`python scripts/benchmark_faults.py [key=value ...]`: the same as `plantation benchmark-faults [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["benchmark-faults", *sys.argv[1:]]))
