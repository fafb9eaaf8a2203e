"""numba kernels (no I/O). Importing the package stamps their cached code with a digest of
the kernel and rule sources first (see ``_cache``)."""

from replay.kernels import _cache  # noqa: F401  (before any kernel module defines a function)
