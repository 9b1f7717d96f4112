"""What a registry holds: table counts, loaded sources, quarantine reasons with examples."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from cohort.registry import table_counts


@dataclass(frozen=True)
class RegistryStatus:
    """Counts, sources and quarantine reasons of a registry (frames for printing or tests)."""

    counts: dict[str, int]
    sources: pd.DataFrame
    quarantine_reasons: pd.DataFrame
    repairs: pd.DataFrame
    reconciles: bool


def registry_status(con, *, examples: int = 2) -> RegistryStatus:
    """Summarize the registry; ``examples`` raw values are shown per quarantine reason."""
    sources = con.execute(
        """
        SELECT source_id, source_file, target_table AS "table", rows_read AS "read",
               rows_loaded AS loaded, rows_quarantined AS quarantined,
               rows_duplicate AS duplicate, rows_repaired AS repaired, loaded_at
        FROM load_log ORDER BY loaded_at, source_id
        """
    ).df()
    reasons = con.execute(
        """
        SELECT l.target_table AS "table", q.field, q.reason, count(*) AS n,
               list(q.record ORDER BY q.record)[1:$k] AS example_records,
               list(q.raw_value ORDER BY q.record)[1:$k] AS example_values
        FROM quarantine AS q JOIN load_log AS l USING (source_id)
        GROUP BY ALL ORDER BY n DESC, "table", q.field, q.reason
        """,
        {"k": examples},
    ).df()
    repairs = con.execute(
        "SELECT field, rule, count(*) AS n FROM repair GROUP BY ALL ORDER BY n DESC, field"
    ).df()
    reconciles = bool(
        sources.empty or (sources["read"] == sources["loaded"] + sources["quarantined"] + sources["duplicate"]).all()
    )
    return RegistryStatus(table_counts(con), sources, reasons, repairs, reconciles)
