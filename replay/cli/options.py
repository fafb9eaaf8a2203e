"""Options shared by several commands (one definition each)."""

from __future__ import annotations

import typer

ENGINE = typer.Option("local", "--engine", help="Where the per-campaign work runs: local "
                      "(DuckDB and a process pool) or spark (needs the spark extra; "
                      "default local).")
MASTER = typer.Option(None, "--master", help="Spark master URL with --engine spark, e.g. "
                      "local[4] or spark://host:7077 (default local[2]; under spark-submit, "
                      "its own --master).")

# Replay window and schedule (backtest, whatif).
START = typer.Option(None, "--start", help="Replay window start, ISO-8601 UTC, inclusive "
                     "(default: log start + --train-days).")
END = typer.Option(None, "--end", help="Replay window end, ISO-8601 UTC, exclusive "
                   "(default: the end of the log).")
TRAIN_DAYS = typer.Option(1.0, "--train-days", help="Days of log before each campaign's "
                          "replay start used for training (landscape, forecast, cold start); "
                          "> 0 (default 1).")
EVERY = typer.Option(None, "--every", help="Update interval of log time with a unit s, min, "
                     "h or d, e.g. 15min (default 15min).")
EVERY_N = typer.Option(None, "--every-n", help="Update every N requests instead of every "
                       "--every (default: off).")
CHARGES = typer.Option("expected", "--charges", help="expected: charge the price; sampled: "
                       "charge price/charge_prob with probability charge_prob, seeded "
                       "(default expected).")
SEED = typer.Option(0, "--seed", help="Random seed (sampled charges); each campaign derives "
                    "its own from (seed, campaign id) (default 0).")
SHADING = typer.Option("empirical", "--shading", help="Landscape model for first-price "
                       "shading, fit on the training window: empirical or lognormal "
                       "(default empirical).")
