"""Matplotlib with the Agg backend, imported ahead of need.

Preloaded by the fork server of :func:`phantometry.compare.compare`, so every worker process
starts with pyplot imported (about half a second each otherwise). Pictures are only ever
drawn off screen (Agg), so selecting it here changes nothing else.
"""

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot  # noqa: E402,F401  (the import is the point)
