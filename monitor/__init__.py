"""Streaming statistical process monitoring for factory lines.

The statistics live in :mod:`monitor.spc` (pure, no I/O); everything that talks
to files, brokers or databases lives beside it in the ``monitor`` package.
"""

import os

# The monitor's linear algebra is small (Markov chains of a few hundred states); threaded BLAS
# only adds start-up and contention costs on the small edge boxes it runs on. Set these
# variables before starting Python to choose otherwise.
for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")

__all__: list[str] = []
