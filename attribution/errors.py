"""Exit codes of the command line, and the error that ends a run with code 1.

Kept free of heavy imports so that ``attribution --help`` and ``--version`` answer at once.
"""

EXIT_OK = 0        # success: everything explained within limits
EXIT_FAILED = 1    # failure: unusable input file, busy archive, unexpected error
EXIT_USAGE = 2     # usage error: bad flag, date or job-file key
EXIT_FINDINGS = 3  # finished and archived, with rejected positions, residual limit breaches or a missing business day


class JobFailure(RuntimeError):
    """The run cannot go on: an unusable input file, a busy archive. The message says why."""
