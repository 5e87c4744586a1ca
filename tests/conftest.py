"""Test-wide settings.

In CI (``CI`` set, as `.ci/run` is run) property-based tests draw their examples from a
fixed seed, so a failure there is reproduced by running the same command again; a
developer's run keeps exploring new examples. No test carries a time limit (speed is
measured by the scripts in bench/, never asserted).
"""
import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True, deadline=None, print_blob=True)
settings.register_profile("dev", deadline=None)
settings.load_profile("ci" if os.environ.get("CI") else "dev")
