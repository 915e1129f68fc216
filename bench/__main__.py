"""`python -m bench [--quick]` (see bench/README.md)."""

import os
import sys

# One intra-op thread everywhere: BLAS pools read these when numpy first loads, so they are set
# before anything imports numpy. OPENBLAS_CORETYPE, when the machine sets it, is left as it is.
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_name] = "1"

from bench.run import main  # noqa: E402

sys.exit(main())
