"""The SQL a run executes: templates of ``queries/`` rendered into each check's plan (DuckDB's), and
that plan turned into Spark's where the project runs on Spark. Text only: nothing here runs SQL
against the warehouse."""
