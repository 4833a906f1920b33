"""Published copies of the result tables for dashboards: Parquet folder, DuckDB snapshot, PostgreSQL."""
