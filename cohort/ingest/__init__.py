"""Ingest: source exports (CSV, Parquet, FHIR R4 NDJSON) -> canonical registry tables."""

from cohort.ingest.loader import LoadResult, ingest, load_file
from cohort.ingest.mapping import Mapping, load_mapping
from cohort.ingest.status import registry_status

__all__ = ["LoadResult", "Mapping", "ingest", "load_file", "load_mapping", "registry_status"]
