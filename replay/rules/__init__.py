"""Bid rules. ``replay.kernels`` is imported first so the rules' cached numba updates are
stamped like the kernels' (see ``replay.kernels._cache``)."""

import replay.kernels  # noqa: F401
