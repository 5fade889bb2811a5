"""The package imports and exposes its version (packaging check, no outside reference needed)."""

import phasorgraph


def test_version():
    assert phasorgraph.__version__ == "0.1.0"
