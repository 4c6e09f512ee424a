"""`python scripts/benchmark_plots.py [key=value ...]`: the same as `plantation benchmark-plots [key=value ...]`."""

import sys

from plantation.cli import main

if __name__ == "__main__":
    sys.exit(main(["benchmark-plots", *sys.argv[1:]]))
