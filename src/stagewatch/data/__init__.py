"""The data side: what each check reads from a stage's log, scans that turn rows into counts, baselines, checks
and attribution. Counts are the contract between the scans and the statistics: nothing downstream of a scan
knows which engine produced them."""

DIALECTS = ("duckdb", "spark", "trino", "bigquery", "snowflake", "postgres")  # the SQL `check --emit-sql` writes
