"""``python -m fitrank.native``: compile the native online kernels (``make`` runs this after installing).

Without a C++ compiler it says so and exits 0: fitrank then runs on XLA's code.
"""

import sys

from fitrank import native

try:
    path = native.build()
except RuntimeError as err:
    print(f"fitrank.native: not built: {err}", file=sys.stderr)
    sys.exit(0)
print(f"fitrank.native: built {path.name}")
