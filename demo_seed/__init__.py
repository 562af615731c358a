"""The invented demo scenario: simulator, district map and vintaged observations.

All names, places and numbers are invented for the demo. Only the CLI's demo command imports
this package; see :func:`demo_seed.scenario.build_scenario`.
"""

from demo_seed.errors import GeometryError, ScenarioArgumentError
from demo_seed.geography import Geography, build_geography, write_geojson
from demo_seed.scenario import (
    MEASURES,
    Catchment,
    RegionSpec,
    Scenario,
    Truth,
    build_scenario,
)

__all__ = [
    "MEASURES",
    "Catchment",
    "Geography",
    "GeometryError",
    "RegionSpec",
    "Scenario",
    "ScenarioArgumentError",
    "Truth",
    "build_geography",
    "build_scenario",
    "write_geojson",
]
