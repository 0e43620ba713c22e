"""mixline: per-member risky/safe splits by mean-variance reasoning, with a tamper-evident log.

One BLAS thread unless the operator says otherwise: the service solves many small problems
next to request handling and its own log writer, and a threaded BLAS on 200 x 200 blocks spent
its time waiting for the other core (publish times spread from 20 to 160 ms; with one thread
16 to 44 ms). Set before numpy is first imported, which is why it lives here.
"""

import os

for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")
