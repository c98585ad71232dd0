"""Errors the user can act on. Each carries a one-line message; the CLI prints it and exits non-zero."""


class StreamtagError(Exception):
    """An expected failure: bad input, bad config, bad file. Message is one line, no traceback."""

    exit_code = 1


class ConfigError(StreamtagError):
    """Configuration file or option is wrong (unknown key, wrong type, missing file)."""

    exit_code = 2


class ModelError(StreamtagError):
    """A model file is missing, truncated, corrupted or of an unknown version."""


class DataError(StreamtagError):
    """A labelled-data or state file has a bad record; the message names file and line."""
