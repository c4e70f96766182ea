"""Test-wide settings. In CI (the CI variable set, as .ci/run's runner does) hypothesis draws a
fixed sequence of examples, so a submission's verdict does not depend on the luck of the draw;
run locally, every run explores new examples and keeps any failure in its example database."""

import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI"):
    settings.load_profile("ci")
