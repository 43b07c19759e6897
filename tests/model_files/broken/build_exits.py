"""A model file whose build_model ends the process (for tests only)."""

import sys


def build_model(data):
    sys.exit("no model today")
