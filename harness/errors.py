"""Error types that the command line turns into clear messages and exit codes."""


class LogtrialError(Exception):
    """Base class for errors reported to the user without a traceback."""

    exit_code = 1


class ConfigError(LogtrialError):
    """A configuration, registry or YAML file is invalid; the message names file and field."""

    exit_code = 2


class DataError(LogtrialError):
    """Input data is unusable; the message names the file, line and expectation."""

    exit_code = 1


class MetricError(DataError):
    """A metric is undefined for the given labels or scores."""
