"""Where the per-campaign work runs: ``local`` (DuckDB plus a process pool; the default,
embedded) or ``spark`` (a Spark cluster, or ``local[N]``). Both run the same kernels and
return the same tables; these three functions pick one by name.

The local path never imports pyspark: ``replay.engines.spark`` imports it on demand.
"""

from __future__ import annotations

from typing import Any

from replay.errors import UsageError

ENGINES = ("local", "spark")


def check_engine(engine: str, master: str | None) -> None:
    """Raise one clear UsageError for an unknown engine, ``--master`` without Spark, or a
    missing pyspark (before any work starts)."""
    if engine not in ENGINES:
        raise UsageError(f"--engine {engine!r}: allowed: {', '.join(ENGINES)}")
    if master is not None and engine != "spark":
        raise UsageError(f"--master {master!r}: only with --engine spark")
    if engine == "spark":
        from replay.engines.spark import require_spark

        require_spark()


def backtest(catalog: Any, rule: Any, params: Any = None, *, engine: str = "local",
             master: str | None = None, **kwargs: Any) -> Any:
    """``replay.engines.local.backtest`` on ``engine`` (same arguments and result)."""
    check_engine(engine, master)
    if engine == "spark":
        from replay.engines.spark import spark_backtest

        return spark_backtest(catalog, rule, params, master=master, **kwargs)
    from replay.engines.local import backtest as local_backtest

    return local_backtest(catalog, rule, params, **kwargs)


def hindsight(source: Any, *, engine: str = "local", master: str | None = None,
              **kwargs: Any) -> Any:
    """``replay.analysis.hindsight.hindsight`` on ``engine`` (same arguments and frame)."""
    check_engine(engine, master)
    if engine == "spark":
        from replay.engines.spark import DEFAULT_MASTER, spark_hindsight

        return spark_hindsight(source, master=master or DEFAULT_MASTER, **kwargs)
    from replay.analysis.hindsight import hindsight as local_hindsight

    return local_hindsight(source, **kwargs)


def whatif(catalog: Any, campaign_id: str, *, engine: str = "local",
           master: str | None = None, **kwargs: Any) -> Any:
    """``replay.engines.local.whatif`` on ``engine`` (one campaign: Spark runs it on the
    driver, see ``replay.engines.spark.spark_whatif``)."""
    check_engine(engine, master)
    if engine == "spark":
        from replay.engines.spark import spark_whatif

        return spark_whatif(catalog, campaign_id, master=master, **kwargs)
    from replay.engines.local import whatif as local_whatif

    return local_whatif(catalog, campaign_id, **kwargs)
