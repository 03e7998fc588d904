"""Errors that reach a user: each message names the bad input and what to do about it."""


class IsoclayError(Exception):
    """Base class for every error isoclay reports to a user (CLI exit code 2 unless stated)."""

    exit_code = 2


class InvalidMesh(IsoclayError):
    """The input mesh cannot be used (empty, non-finite, bad indices, absurd size...)."""


class InvalidInput(IsoclayError):
    """A parameter, handle file, path or option is wrong."""


class ProtocolError(IsoclayError):
    """A wire message is malformed, unsigned, replayed or too large."""


class Cancelled(IsoclayError):
    """The user asked the work to stop; nothing partial was written."""

    exit_code = 3


class SolverFailure(IsoclayError):
    """A numerical step did not converge; the message says which and what to try."""

    exit_code = 1
