"""The Fernhill Broadcasting demo: three weeks of invented playback sessions with labelled incidents.

``generate.build_lake`` writes a hive-partitioned Parquet lake and ``labels.csv``; the labels say
which check must find each incident and which decoys no check may alert on, so the demo doubles as
an end-to-end test of the catalogue. All generation is DuckDB SQL in ``lake.sql``, seeded and
deterministic, so the same seed always gives the same lake.
"""
