"""Config, ingestion, run store, Prefect flow, CLI: the pipeline layer of quakefolio."""
