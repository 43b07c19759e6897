"""A model file that ends the process while it loads (for tests only)."""

import sys

sys.exit(3)
