"""Domain errors and the exit codes the command line maps them to.

Every error a user can cause is one of these classes; the CLI prints
``Error: <message>`` on stderr and exits with the class's ``exit_code``.
Library code raises them and never prints.
"""

from __future__ import annotations

import contextlib
import os

__all__ = [
    "EXIT_OK",
    "EXIT_USAGE",
    "EXIT_PROTOCOL",
    "EXIT_RUNS",
    "EXIT_VERIFY",
    "EXIT_NO_SAFE",
    "EXIT_MODEL",
    "EXIT_IO",
    "GuardbandError",
    "ProtocolError",
    "RunsDataError",
    "VerificationError",
    "NoSafeCandidateError",
    "ModelError",
    "OutputError",
    "OperatorError",
]

EXIT_OK = 0
EXIT_USAGE = 2  # typer/click's own code for a bad command line
EXIT_PROTOCOL = 3  # protocol file missing, unreadable, too large or invalid, or its design space empty or one point
EXIT_RUNS = 4  # runs file (or a recipes table) missing, unreadable, too large or invalid, or more runs than --max-runs
EXIT_VERIFY = 5  # decision log missing, unreadable or failed verification, or a replay differed
EXIT_NO_SAFE = 6  # no candidate passed the safety screen
EXIT_MODEL = 7  # a model could not be fitted or cannot be trusted; the tool refuses
EXIT_IO = 8  # an output could not be written (nothing was changed)


class GuardbandError(Exception):
    """Base class: a problem the user can act on."""

    exit_code: int = 1


class ProtocolError(GuardbandError):
    """The protocol file is unreadable, invalid, or describes an empty design space."""

    exit_code = EXIT_PROTOCOL

    @classmethod
    @contextlib.contextmanager
    def naming(cls, path):
        """Inside, a ProtocolError that does not yet name the protocol file ``path`` is raised
        again with its name in front (an empty design space is found after the file is read)."""
        name = os.path.basename(str(path))
        try:
            yield
        except ProtocolError as exc:
            if str(exc).startswith(f"{name}: "):
                raise
            raise type(exc)(f"{name}: {exc}") from None


class RunsDataError(GuardbandError):
    """The runs file is unreadable or a row/column is invalid."""

    exit_code = EXIT_RUNS


class VerificationError(GuardbandError):
    """A decision log failed verification, or a replay did not match."""

    exit_code = EXIT_VERIFY


class NoSafeCandidateError(GuardbandError):
    """No candidate passed the safety screen."""

    exit_code = EXIT_NO_SAFE


class ModelError(GuardbandError):
    """A Gaussian-process model could not be fitted or cannot be trusted."""

    exit_code = EXIT_MODEL


class OutputError(GuardbandError):
    """An output file could not be written; previous files are unchanged."""

    exit_code = EXIT_IO


class OperatorError(GuardbandError):
    """An operator name (``--by``, ``GUARDBAND_OPERATOR``) or a correction's reason is unusable."""

    exit_code = EXIT_USAGE
