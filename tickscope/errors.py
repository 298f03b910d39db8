"""Exception and warning hierarchy.

Library code raises these; only :mod:`tickscope.cli` turns them into a one-line
message and an exit code.
"""


class TickscopeError(Exception):
    """Base class of every error tickscope raises on purpose."""

    exit_code = 2


class ParameterError(TickscopeError, ValueError):
    """A parameter or option has a value that cannot be used."""


class InputError(TickscopeError, OSError):
    """An input file is missing, unreadable, empty or not audio."""


class NoStepsError(TickscopeError):
    """The audio holds no stepping-motor pattern that could be measured."""

    exit_code = 3


class DeviceError(TickscopeError, RuntimeError):
    """An audio device is missing, failed, or PortAudio is not installed."""


class StoreError(TickscopeError, RuntimeError):
    """The log database cannot be opened, written or read."""


class TickscopeWarning(UserWarning):
    """A soft problem with the input or the result (reported, not fatal)."""
