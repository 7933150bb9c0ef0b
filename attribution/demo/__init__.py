"""The invented demo desk: its definition, simulated market, nightly input folders and ``attribution demo``.

A leaf of the package: it uses the core (pricing, the contract's schemas, the backfill) and nothing
but the command line's ``demo`` command imports it. :mod:`~attribution.demo.desk` reads the desk's
definition (``demo_desk.toml``) and calendar; :mod:`~attribution.demo.market` simulates its market
and listing; :mod:`~attribution.demo.build` trades and marks each night (with the faults of
:mod:`~attribution.demo.faults`) and writes the folders; :mod:`~attribution.demo.run` backfills them.
"""

from __future__ import annotations

from attribution.demo.build import DEFAULT_START, FAULT_KINDS, SCHEMAS, DemoSummary, build_demo
from attribution.demo.nights import PlantedFault

__all__ = ["DEFAULT_START", "FAULT_KINDS", "SCHEMAS", "DemoSummary", "PlantedFault", "build_demo"]
