"""``inrush pull``: unit-level exposures aggregated into the daily cube inside the warehouse
(DuckDB, PostgreSQL or Spark); only the cube leaves the engine."""
