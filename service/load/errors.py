"""The one error of the load tools, a `CairnError` so the CLI prints it as one line and exits 2."""

from service.errors import CairnError


class LoadTestError(CairnError):
    """A load test that cannot be set up or run: a bad flag value, a service that does not start,
    a load generator that fails. Names the bad value or the process and its last log lines."""
