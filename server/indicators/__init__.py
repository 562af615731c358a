"""Indicators: pure statistics on arrays shaped (regions, days); see each module.

No database, web, clock or globals here. Public functions and result classes are re-exported.
"""

from __future__ import annotations

from server.indicators.aberration import (
    EarsResult,
    FarringtonResult,
    ears,
    farrington_flexible,
)
from server.indicators.accuracy import (
    AccuracyReport,
    IntervalScore,
    projection_accuracy,
    weighted_interval_score,
)
from server.indicators.aggregate import Aggregate, sum_counts, weighted_mean
from server.indicators.before_after import BeforeAfter, before_after
from server.indicators.curves import (
    CurveFit,
    CurveInterval,
    fit_growth_curve,
    richards_cumulative,
    richards_inflection,
    richards_peak_incidence,
)
from server.indicators.forecast_scores import (
    ForecastRecord,
    ForecastScores,
    forecast_record,
    last_week_mean,
    poisson_persistence,
    score_forecasts,
)
from server.indicators.growth import (
    GrowthRate,
    design_matrix,
    growth_rate,
    rolling_growth_rate,
)
from server.indicators.hospital import (
    CapacityCrossing,
    IcuProjection,
    LengthOfStay,
    OccupancyShare,
    admission_rate,
    capacity_crossing,
    length_of_stay,
    occupancy_share,
    project_icu,
)
from server.indicators.nowcast import (
    DelayEstimate,
    Nowcast,
    as_triangle,
    cumulative_triangle,
    estimate_delay,
    nowcast,
    triangle_from_vintages,
)
from server.indicators.phase import WavePhase, fit_phase, wave_start
from server.indicators.poisson import (
    IncidenceRate,
    PoissonInterval,
    RateRatio,
    incidence_rate,
    poisson_interval,
    rate_ratio,
)
from server.indicators.renewal import (
    Reproduction,
    infectiousness,
    reproduction_number,
)
from server.indicators.serial_interval import (
    SerialInterval,
    discrete_serial_interval,
    gamma_serial_interval,
    growth_to_reproduction,
    growth_to_reproduction_discrete,
    reproduction_to_growth,
)
from server.indicators.wastewater import (
    NormalisedWastewater,
    SmoothedWastewater,
    WastewaterLevel,
    WastewaterTrend,
    catchment_matrix,
    level,
    normalise,
    smooth,
    to_districts,
    trend,
)
from server.indicators.wilson import (
    Positivity,
    ProportionInterval,
    TestingRate,
    positivity,
    testing_rate,
    wilson_interval,
)
from server.indicators.windows import (
    WeeklySeries,
    WindowedSeries,
    rolling_mean,
    rolling_sum,
    weekly_sum,
)

__all__ = [
    "Aggregate",
    "sum_counts",
    "weighted_mean",
    "BeforeAfter",
    "before_after",
    "AccuracyReport",
    "CapacityCrossing",
    "CurveFit",
    "CurveInterval",
    "DelayEstimate",
    "EarsResult",
    "FarringtonResult",
    "ForecastRecord",
    "ForecastScores",
    "GrowthRate",
    "IcuProjection",
    "IncidenceRate",
    "IntervalScore",
    "LengthOfStay",
    "NormalisedWastewater",
    "Nowcast",
    "OccupancyShare",
    "PoissonInterval",
    "Positivity",
    "ProportionInterval",
    "RateRatio",
    "Reproduction",
    "SerialInterval",
    "SmoothedWastewater",
    "TestingRate",
    "WastewaterLevel",
    "WastewaterTrend",
    "WavePhase",
    "WeeklySeries",
    "WindowedSeries",
    "admission_rate",
    "as_triangle",
    "capacity_crossing",
    "catchment_matrix",
    "cumulative_triangle",
    "design_matrix",
    "discrete_serial_interval",
    "ears",
    "estimate_delay",
    "farrington_flexible",
    "forecast_record",
    "fit_growth_curve",
    "fit_phase",
    "gamma_serial_interval",
    "growth_rate",
    "growth_to_reproduction",
    "growth_to_reproduction_discrete",
    "incidence_rate",
    "last_week_mean",
    "infectiousness",
    "length_of_stay",
    "level",
    "normalise",
    "nowcast",
    "occupancy_share",
    "poisson_interval",
    "poisson_persistence",
    "positivity",
    "project_icu",
    "projection_accuracy",
    "rate_ratio",
    "reproduction_number",
    "reproduction_to_growth",
    "richards_cumulative",
    "richards_inflection",
    "richards_peak_incidence",
    "score_forecasts",
    "rolling_growth_rate",
    "rolling_mean",
    "rolling_sum",
    "smooth",
    "testing_rate",
    "to_districts",
    "trend",
    "triangle_from_vintages",
    "wave_start",
    "weekly_sum",
    "weighted_interval_score",
    "wilson_interval",
]
