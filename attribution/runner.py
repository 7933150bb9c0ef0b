"""Which engine computes a night: the job's choice (``engine = "local"`` or ``"dask"``), made above the engine.

:mod:`attribution.engine` runs a night with the prepare step it is given and knows no cluster;
:mod:`attribution.dask_engine` builds on the engine's :func:`~attribution.engine.prepare_night`.
This module sits above both, so the import graph stays one way: runner -> dask_engine -> engine.
The command line, the backfill and the bench run their nights through :func:`run_night` here.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import functools
from typing import Any

from attribution.config import JobConfig
from attribution.date_cache import DateCache
from attribution.engine import ArchiveSession, NightOutcome, Prepare, Progress, prepare_night
from attribution.engine import run_night as run_prepared_night

__all__ = ["cluster", "preparer", "run_night"]


def preparer(config: JobConfig, client: Any = None, cache: DateCache | None = None) -> Prepare:
    """The step that computes a night's tables under ``config.engine``.

    ``client``: with ``engine = "dask"``, a Dask client already connected (the caller keeps it open);
    None connects to ``config.scheduler`` or starts a local cluster for each night.
    ``cache``: a backfill's shared work on its dates (the local engine; see :mod:`attribution.date_cache`).
    """
    if config.engine != "dask":
        return prepare_night if cache is None else functools.partial(prepare_night, cache=cache)
    from attribution.dask_engine import prepare_night_dask  # dask is an optional extra
    return functools.partial(prepare_night_dask, client=client)


def cluster(config: JobConfig) -> contextlib.AbstractContextManager[Any]:
    """A Dask client for a range of nights with ``engine = "dask"`` (one cluster serves them all); else None."""
    if config.engine != "dask":
        return contextlib.nullcontext()
    from attribution.dask_engine import cluster_client
    return cluster_client(config)


def run_night(config: JobConfig, as_of: dt.date, prior: dt.date | None = None,
              progress: Progress | None = None, session: ArchiveSession | None = None,
              client: Any = None, cache: DateCache | None = None) -> NightOutcome:
    """Run one night into the archive (and reports) on the job's engine; see :func:`attribution.engine.run_night`.

    ``client``: with ``engine = "dask"``, a Dask client already connected (a backfill keeps one,
    see :func:`cluster`); None connects for this night. ``cache``: see :func:`preparer`.
    """
    return run_prepared_night(config, as_of, prior, progress, session, preparer(config, client, cache))
