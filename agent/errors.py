"""The exception tree of ballpass.

Every library error (PortAudio, OSError, paho return codes, SQLite) is turned
into one of these at exactly one place in the module that talks to that
library, with a message a technician can act on.
"""


class BallpassError(Exception):
    """Base of every error this package raises on purpose."""


class ConfigError(BallpassError):
    """The configuration is invalid.

    Parameters
    ----------
    problems : list of str
        Every problem found, each naming the key path, the value and what is
        allowed.  All problems are collected before raising.
    """

    def __init__(self, problems):
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))


class UsageError(BallpassError):
    """A command-line argument or an input file cannot be used."""


class WavFormatError(UsageError):
    """A WAV file cannot be read or is in a format we do not handle."""


class SourceError(BallpassError):
    """The signal source cannot be opened or stopped delivering."""


class DeviceNotFound(SourceError):
    """The configured input device is not present (unplugged, wrong name)."""


class BrokerError(BallpassError):
    """The MQTT broker refused us or cannot be reached."""


class OutboxError(BallpassError):
    """The persistent outbox cannot be opened or written."""
