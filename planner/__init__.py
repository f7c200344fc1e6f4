"""sluice planner: chart request -> logical plan -> sqlglot statements for one dialect.

Pure library: no I/O, no web framework. The service in ``app`` supplies the source schema
(introspected from the engine) and executes what this package plans.
"""

from planner.errors import PlanError
from planner.model import ChartRequest
from planner.schema import ColumnInfo, SourceSchema

__all__ = ["ChartRequest", "ColumnInfo", "PlanError", "SourceSchema"]
