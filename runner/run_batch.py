"""Run a batch of tempofield analyses on a dask cluster: ``python runner/run_batch.py --help``.

A thin door to :mod:`tempofield.batch.runner`, which holds the logic (importable, so
worker processes can load the functions the batch sends them). See
runner/README.md for use on a workstation and on a SLURM/PBS cluster.
"""

import sys

from tempofield.batch.runner import main

if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
