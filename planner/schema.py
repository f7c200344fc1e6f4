"""What the planner knows about a source table: column names and kinds.

Kinds come from the engine's own type names (introspected by the service), classified with
sqlglot's type parser so every dialect's spelling maps to the same small set.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from sqlglot import exp

NUMBER_KINDS = frozenset({"integer", "double", "decimal"})
TEMPORAL_KINDS = frozenset({"timestamp", "timestamptz", "date"})
CATEGORY_KINDS = frozenset({"string", "boolean"})


@dataclass(frozen=True)
class ColumnInfo:
    name: str
    kind: str  # integer | double | decimal | string | boolean | timestamp | timestamptz | date | other
    sql_type: str = ""
    #: a time column none of whose cells the dialect's range test turns into NULL in this
    #: data version ('infinity', year 12000; on SQLite also a cell outside its storage
    #: convention: ``Dialect.instant_range``), proved by the catalog (app.catalog
    #: ``_in_range``, file sources): time keys and measures then skip that test
    in_range: bool = False

    @property
    def is_number(self) -> bool:
        return self.kind in NUMBER_KINDS

    @property
    def is_temporal(self) -> bool:
        return self.kind in TEMPORAL_KINDS

    @property
    def is_category(self) -> bool:
        return self.kind in CATEGORY_KINDS


@dataclass(frozen=True)
class Dimension:
    """A many-to-one join to a dimension table (Kimball & Ross, The Data Warehouse Toolkit):
    ``fact_column`` of the source equals ``key`` of ``table``; its ``columns`` are requested as
    ``<name>.<column>``. ``duplicate``: a key value the engine found more than once (fan-out:
    a request using the dimension is refused), else None. ``key_column``: the key's type,
    so that the join reads it as the fact column is read (``Dialect.stored``)."""

    name: str
    table: tuple[str, ...]
    fact_column: str
    key: str
    columns: tuple[str, ...]
    duplicate: str | None = None
    key_column: ColumnInfo | None = None

    def column_name(self, column: str) -> str:
        return f"{self.name}.{column}"


@dataclass(frozen=True)
class SourceSchema:
    name: str
    table: tuple[str, ...]  # qualified table name parts, e.g. ("main", "deliveries")
    #: every column a request may name: physical, computed and dimension columns
    columns: dict[str, ColumnInfo] = field(default_factory=dict)
    #: named measures (config ``[sources.X.measures]``): name -> aggregate expression text,
    #: checked per request by planner/measure_sql.py
    measures: dict[str, str] = field(default_factory=dict)
    #: computed columns ([sources.X.columns]): name -> SQL text over the physical columns,
    #: rebuilt per dialect by planner.expr_sql when a statement uses them
    computed: dict[str, str] = field(default_factory=dict)
    dimensions: tuple[Dimension, ...] = ()
    #: a request's ``{"expr": ...}`` terms: relation column name (planner.names.expr_column)
    #: -> SQL text over every other column (physical, computed, dimension); in ``columns``
    #: under their text, as a ColumnInfo of that relation column
    exprs: dict[str, str] = field(default_factory=dict)
    #: the computed and dimension columns this request uses: what ``planner.source.relation``
    #: adds to the table (empty: the plain table)
    joined: frozenset[str] = frozenset()
    #: the calling API key's row condition on this source (``[[keys]] rows``): SQL text of
    #: the ``filter_sql`` allow-list, compiled per dialect by ``planner.source.relation``
    #: into every statement's FROM; None: every row
    rows: str | None = None

    def column(self, name: str) -> ColumnInfo | None:
        return self.columns.get(name)

    def dimension_of(self, column: str) -> Dimension | None:
        """The dimension a ``depots.city`` column comes from (None for other columns)."""
        for dim in self.dimensions:
            if column.startswith(dim.name + ".") and column[len(dim.name) + 1:] in dim.columns:
                return dim
        return None

    def model_columns(self) -> frozenset[str]:
        """The names the source model and the request's exprs add to the table's columns."""
        return frozenset(self.computed) | frozenset(self.exprs) | frozenset(
            dim.column_name(c) for dim in self.dimensions for c in dim.columns)

    def physical(self) -> "SourceSchema":
        """The table's own columns only (what a computed column may read)."""
        model = self.model_columns()
        return SourceSchema(self.name, self.table,
                            {n: c for n, c in self.columns.items() if c.name not in model})


_INTEGER = {
    exp.DataType.Type.TINYINT, exp.DataType.Type.SMALLINT, exp.DataType.Type.INT,
    exp.DataType.Type.BIGINT, exp.DataType.Type.UTINYINT, exp.DataType.Type.USMALLINT,
    exp.DataType.Type.UINT, exp.DataType.Type.UBIGINT, exp.DataType.Type.INT128,
    exp.DataType.Type.INT256,
    exp.DataType.Type.UINT128, exp.DataType.Type.UINT256, exp.DataType.Type.MEDIUMINT,
    exp.DataType.Type.UMEDIUMINT,
}
_DOUBLE = {exp.DataType.Type.FLOAT, exp.DataType.Type.DOUBLE}
_DECIMAL = {exp.DataType.Type.DECIMAL, exp.DataType.Type.BIGDECIMAL, exp.DataType.Type.MONEY,
            exp.DataType.Type.SMALLMONEY, exp.DataType.Type.UDECIMAL,
            exp.DataType.Type.DECIMAL32, exp.DataType.Type.DECIMAL64,
            exp.DataType.Type.DECIMAL128, exp.DataType.Type.DECIMAL256}
_STRING = {exp.DataType.Type.VARCHAR, exp.DataType.Type.CHAR, exp.DataType.Type.TEXT,
           exp.DataType.Type.NVARCHAR, exp.DataType.Type.NCHAR, exp.DataType.Type.BPCHAR,
           exp.DataType.Type.LONGTEXT, exp.DataType.Type.MEDIUMTEXT, exp.DataType.Type.TINYTEXT,
           }
_TSTZ = {exp.DataType.Type.TIMESTAMPTZ, exp.DataType.Type.TIMESTAMPLTZ,
         exp.DataType.Type.DATETIME64}
_TS = {exp.DataType.Type.TIMESTAMP, exp.DataType.Type.DATETIME, exp.DataType.Type.DATETIME2,
       exp.DataType.Type.SMALLDATETIME, exp.DataType.Type.TIMESTAMP_S,
       exp.DataType.Type.TIMESTAMP_MS, exp.DataType.Type.TIMESTAMP_NS, exp.DataType.Type.TIMESTAMPNTZ}


def classify(sql_type: str, dialect: str | None = None) -> str:
    """Map an engine type name (``BIGINT``, ``timestamp with time zone``, ``Nullable(String)``)
    to a column kind."""
    text = sql_type.strip()
    # ClickHouse wrappers carry no meaning for the kind.
    for wrapper in ("Nullable(", "LowCardinality("):
        while text.startswith(wrapper) and text.endswith(")"):
            text = text[len(wrapper):-1]
    low = text.lower()
    if low in ("bool", "boolean", "tinyint(1)"):
        return "boolean"
    if low.startswith("datetime64") and "," in low:
        return "timestamptz"
    try:
        dt = exp.DataType.build(text, dialect=dialect)
    except Exception:  # noqa: BLE001 - unknown spellings are simply "other"
        return "other"
    t = dt.this
    if t.name in ("ENUM", "UUID", "NAME"):
        return "string"
    if t.name == "HUGEINT":
        return "integer"
    if t == exp.DataType.Type.BOOLEAN:
        return "boolean"
    if t in _INTEGER:
        return "integer"
    if t in _DOUBLE:
        return "double"
    if t in _DECIMAL:
        return "decimal"
    if t in _STRING:
        return "string"
    if t in _TSTZ:
        return "timestamptz"
    if t in _TS:
        return "timestamp"
    if t in (exp.DataType.Type.DATE, exp.DataType.Type.DATE32):
        return "date"
    return "other"
