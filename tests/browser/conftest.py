"""Browser tests reuse the queue tests' loop fixture and share the Chromium fixture."""

from tests.browser.test_bench import browser  # noqa: F401, E402  (a fixture)
from tests.queue.conftest import make_loop  # noqa: F401  (a fixture, found here by pytest)
