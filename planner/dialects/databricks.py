"""Databricks SQL (generated only): the Spark SQL dialect; sessions default to UTC."""

from planner.dialects.spark import Databricks

__all__ = ["Databricks"]
