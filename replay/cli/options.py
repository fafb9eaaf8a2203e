"""Options shared by several commands (one definition each)."""

from __future__ import annotations

import typer

ENGINE = typer.Option("local", "--engine", help="Where the per-campaign work runs: local "
                      "(DuckDB and a process pool) or spark (needs the spark extra; "
                      "default local).")
MASTER = typer.Option(None, "--master", help="Spark master URL with --engine spark, e.g. "
                      "local[4] or spark://host:7077 (default local[2]; under spark-submit, "
                      "its own --master).")
