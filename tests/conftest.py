"""Shared test fixtures."""

import os

# Never touch the network from tests: astropy must use its packaged tables only.
os.environ.setdefault("SKYDRIFT_TESTING", "1")
