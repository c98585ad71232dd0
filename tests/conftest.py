"""Shared test set-up. Importing streamtag first pins BLAS to one thread before numpy loads."""

import streamtag  # noqa: F401  (side effect: OPENBLAS_NUM_THREADS etc. default to 1)
