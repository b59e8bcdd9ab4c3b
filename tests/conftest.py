"""Test-suite settings.

Property tests run a fixed (derandomized) set of examples by default, so `make test` gives the
same verdict on every machine; `HYPOTHESIS_PROFILE=explore` searches fresh random examples.
"""

import os

from hypothesis import settings

settings.register_profile("fixed", derandomize=True, print_blob=True)
settings.register_profile("explore", derandomize=False, max_examples=200)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "fixed"))
