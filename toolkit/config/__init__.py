"""Loading a project: YAML with the line of every key, the key tables, each section's validation,
expressions checked by an allow-list, and the binding of columns to the source's Parquet schema.
What comes out is a :class:`toolkit.model.Project`, or every problem with its file and line."""
