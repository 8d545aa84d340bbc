"""Run a batch of rhythmap analyses on a dask cluster: ``python runner/run_batch.py --help``.

A thin door to :mod:`rhythmap.batch`, which holds the logic (importable, so
worker processes can load the functions the batch sends them). See
runner/README.md for use on a workstation and on a SLURM/PBS cluster.
"""

import sys

from rhythmap.batch import main

if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
