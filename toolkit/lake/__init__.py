"""The lake: listing a source's Parquet files (locally or in object storage), reading their
footers, and refusing new files that do not fit the source."""
