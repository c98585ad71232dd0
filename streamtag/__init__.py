"""streamtag: tag entities in streaming log lines with a linear-chain CRF."""

__version__ = "0.1.0"
