"""Revision tests reuse the queue tests' loop fixture."""

from tests.queue.conftest import make_loop  # noqa: F401  (a fixture, found here by pytest)
