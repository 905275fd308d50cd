"""Settings for the whole test run."""

import os

# Tests read the bundled set's stored model but never rewrite it, so that the check that the
# committed model is fresh (tests/match/test_persist.py) sees the file as committed.
os.environ.setdefault("RAMIFORM_STORE_MODELS", "0")
