"""The errors liftmag reports to its user: one base class, one line, exit status 2.

Every error a user can cause and fix (a missing file, a bad option, a take that does not fit
the request) derives from :class:`LiftmagError`; ``liftmag.cli.main`` prints it as one line
and returns exit status 2. Errors of the core's own arguments stay plain ``ValueError``;
the classes that are also ``ValueError`` keep that base so older ``except ValueError``
handlers still see them.
"""

from __future__ import annotations


class LiftmagError(Exception):
    """A problem with the user's request or input, said in one line (exit status 2)."""


class UserError(LiftmagError):
    """A verb's own complaint about its arguments or inputs, raised by ``liftmag.commands``."""
