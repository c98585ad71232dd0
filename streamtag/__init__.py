"""streamtag: tag entities in streaming log lines with a linear-chain CRF."""

import os as _os

# streamtag runs its own worker threads and processes; BLAS threads on top of them busy-wait and
# slow everything down (measured: 4x slower training with two OpenBLAS threads on two cores), and
# a fixed thread count keeps trained weights reproducible. Set before numpy is first imported;
# a value the user set explicitly wins.
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_name, "1")

__version__ = "0.1.0"
