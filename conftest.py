"""Root pytest configuration (doctests in daemon/ and clients/ and the tests/ suite).

Small-matrix numerics at a high rate: one BLAS thread, as the daemon itself runs
(daemon/cli.py); set before numpy is imported anywhere.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
