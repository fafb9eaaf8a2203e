"""Suite-wide setup: the replay loop builds (``replay.kernels._fused_build``) go to a folder
in the checkout, shared by the pytest workers and the CLI subprocesses, not the user's home."""

import os
from pathlib import Path

os.environ.setdefault("REPLAY_CACHE_DIR",
                      str(Path(__file__).resolve().parent.parent / ".pytest_cache"
                          / "fused-loops"))
