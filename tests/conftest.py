"""Test-suite settings shared by every module.

Under CI (the environment variable CI is set, as `.ci/run` is run) hypothesis
draws the same examples every time (derandomize), so a submission's result
does not depend on luck; locally it explores new examples on every run.
"""

from __future__ import annotations

import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True, deadline=None, print_blob=True)
settings.register_profile("dev", deadline=None)
settings.load_profile("ci" if os.environ.get("CI") else "dev")
