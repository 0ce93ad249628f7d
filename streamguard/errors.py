"""The project's exceptions: few, flat, and worded so the message says what to fix.

Only ``cli.py`` turns these into exit codes; everything else raises them with the place
(file:line, config key path, topic) already in the message.
"""


class StreamguardError(Exception):
    """Base of every error the user can cause and fix."""

    exit_code = 2


class ConfigError(StreamguardError):
    """A config or limits file is invalid; the message names the key path."""


class InputError(StreamguardError):
    """A historian file or payload cannot be read; the message names file:line or topic."""


class LimitsError(StreamguardError):
    """Phase I could not produce limits for a tag, or a limits file does not fit the config."""


class UsageError(StreamguardError):
    """A command-line argument is wrong."""
