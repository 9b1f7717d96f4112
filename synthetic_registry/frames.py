"""Polars frames of one block in the flat export layout (docs/export-format.md) and truth."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from synthetic_registry.clinical import Records
from synthetic_registry.config import Config
from synthetic_registry.ecgs import AV_CODES, EVENTS, RHYTHM_CODES, Tracings
from synthetic_registry.population import (
    DEVICES,
    END_REASONS,
    HG_TYPES,
    PM_INDICATIONS,
    VC_CODES,
    Persons,
)
from synthetic_registry.reads import Read, Reads
from synthetic_registry.statements import render_statements
from synthetic_registry.waves import Strips

PERSON_SCHEMA = {
    "person_id": pl.String,
    "birth_date": pl.Date,
    "sex": pl.String,
    "site": pl.String,
    "death_date": pl.Date,
    "followup_end": pl.Date,
}
ECG_SCHEMA = {
    "tracing_id": pl.String,
    "person_id": pl.String,
    "acquired_at": pl.Datetime("ms"),
    "site": pl.String,
    "read_kind": pl.String,
    "vent_rate": pl.Int32,
    "atrial_rate": pl.Int32,
    "pr_ms": pl.Int32,
    "qrs_ms": pl.Int32,
    "qt_ms": pl.Int32,
    "qtc_ms": pl.Int32,
    "p_axis": pl.Int32,
    "qrs_axis": pl.Int32,
    "t_axis": pl.Int32,
    "statements": pl.String,
    "statement_codes": pl.String,
}
WAVE_SCHEMA = {"tracing_id": pl.String, "t_ms": pl.Int32, "kind": pl.String}
PROCEDURE_SCHEMA = {
    "person_id": pl.String,
    "procedure_date": pl.Date,
    "code_system": pl.String,
    "code": pl.String,
}
DIAGNOSIS_SCHEMA = {
    "person_id": pl.String,
    "diagnosis_date": pl.Date,
    "code_system": pl.String,
    "code": pl.String,
}
MEASURES = (
    "vent_rate",
    "atrial_rate",
    "pr_ms",
    "qrs_ms",
    "qt_ms",
    "qtc_ms",
    "p_axis",
    "qrs_axis",
    "t_axis",
)
_READ_FIELDS = (
    "vent_rate",
    "atrial_rate",
    "pr",
    "qrs",
    "qt",
    "qtc",
    "p_axis",
    "qrs_axis",
    "t_axis",
)


@dataclass
class BlockFrames:
    """All frames of one block, ready to write."""

    persons: pl.DataFrame
    ecgs: pl.DataFrame
    waves: pl.DataFrame
    procedures: pl.DataFrame
    diagnoses: pl.DataFrame
    persons_truth: pl.DataFrame
    ecg_truth: pl.DataFrame


def person_ids(index: np.ndarray) -> pl.Series:
    """Stable person identifiers: "P" + 8 digits (1-based)."""
    digits = pl.Series(index + 1).cast(pl.String).str.zfill(8)
    return pl.select(pl.format("P{}", digits)).to_series().alias("person_id")


def tracing_ids(first: int, n: int) -> pl.Series:
    """Stable tracing identifiers: "E" + 10 digits, numbered in file order."""
    seq = pl.Series(np.arange(first + 1, first + n + 1, dtype=np.int64))
    return (
        pl.select(pl.format("E{}", seq.cast(pl.String).str.zfill(10)))
        .to_series()
        .alias("tracing_id")
    )


def _days(x: np.ndarray) -> pl.Series:
    """Day numbers (NaN/inf -> null) as a Date series."""
    ok = np.isfinite(x)
    s = pl.Series(np.where(ok, x, 0).astype(np.int32)).cast(pl.Date)
    return pl.select(pl.when(pl.Series(ok)).then(s).otherwise(None)).to_series()


def _ints(x: np.ndarray, name: str) -> pl.Series:
    """Rounded numbers (NaN -> null) as Int32."""
    ok = np.isfinite(x)
    s = pl.Series(name, np.where(ok, np.round(x), 0).astype(np.int32))
    return pl.select(pl.when(pl.Series(ok)).then(s).otherwise(None)).to_series().alias(name)


def persons_frame(cfg: Config, p: Persons) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "person_id": person_ids(p.index),
            "birth_date": _days(p.birth),
            "sex": p.sex.astype(object),
            "site": cfg.sites.name[p.site],
            "death_date": _days(p.death),
            "followup_end": _days(p.end),
        },
        schema=PERSON_SCHEMA,
    )


def _read_frame(
    cfg: Config,
    rng: np.random.Generator,
    tr: Tracings,
    read: Read,
    kind: str,
    rows: np.ndarray,
    ids: pl.Series,
    pids: pl.Series,
) -> pl.DataFrame:
    upper = (
        cfg.sites.upper_case[tr.site[rows]]
        if kind == "machine"
        else np.zeros(rows.size, dtype=bool)
    )
    codes = rng.random(rows.size) < cfg.sites.codes_share[tr.site[rows]]
    text, code = render_statements(cfg, rng, read.slots[rows], kind, upper, codes)
    ms = np.round(tr.t[rows] * 86_400.0).astype(np.int64) * 1000
    cols: dict[str, pl.Series] = {
        "tracing_id": ids.gather(rows),
        "person_id": pids.gather(tr.person[rows]),
        "acquired_at": pl.Series(ms).cast(pl.Datetime("ms")),
        "site": pl.Series(cfg.sites.name[tr.site[rows]].tolist(), dtype=pl.String),
        "read_kind": pl.Series([kind] * rows.size, dtype=pl.String),
    }
    for out, field in zip(MEASURES, _READ_FIELDS, strict=True):
        cols[out] = _ints(getattr(read, field)[rows], out)
    cols["statements"] = text
    cols["statement_codes"] = code
    frame = pl.DataFrame(cols, schema=ECG_SCHEMA)
    order = rows * 2 + (0 if kind == "machine" else 1)
    return frame.with_columns(pl.Series("_order", order))


def ecgs_frame(
    cfg: Config,
    rng: np.random.Generator,
    tr: Tracings,
    reads: Reads,
    ids: pl.Series,
    pids: pl.Series,
) -> pl.DataFrame:
    """Machine read of every tracing, each followed by its confirmed read where one exists."""
    all_rows = np.arange(tr.n)
    machine = _read_frame(cfg, rng, tr, reads.machine, "machine", all_rows, ids, pids)
    conf_rows = np.flatnonzero(reads.has_confirmed)
    confirmed = _read_frame(cfg, rng, tr, reads.confirmed, "confirmed", conf_rows, ids, pids)
    return pl.concat([machine, confirmed]).sort("_order").drop("_order")


def waves_frame(strips: Strips, ids: pl.Series) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "tracing_id": ids.gather(strips.event_tracing),
            "t_ms": strips.event_t_ms.astype(np.int32),
            "kind": np.where(strips.event_is_p, "P", "QRS").astype(object),
        },
        schema=WAVE_SCHEMA,
    )


def records_frame(
    rec: Records, pids: pl.Series, system: str, date_col: str, schema: dict
) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "person_id": pids.gather(rec.person),
            date_col: _days(rec.day),
            "code_system": [system] * rec.person.size,
            "code": rec.code.astype(object),
        },
        schema=schema,
    )


def _names(codes: tuple[str, ...], idx: np.ndarray) -> pl.Series:
    arr = np.array(codes + ("",), dtype=object)[np.where(idx >= 0, idx, len(codes))]
    return pl.Series(arr.tolist(), dtype=pl.String).replace("", None)


def _slot_names(cfg: Config, slots: np.ndarray) -> pl.Series:
    """Concept names of a read's filled statement slots, in slot order, joined by ";"."""
    cols = [_names(cfg.lexicon.concepts, slots[:, j]).alias(f"s{j}") for j in range(slots.shape[1])]
    joined = pl.DataFrame(cols).select(
        pl.concat_str(pl.all(), separator=";", ignore_nulls=True).alias("s")
    )["s"]
    return joined.replace("", None)


def persons_truth_frame(
    cfg: Config, p: Persons, pids: pl.Series, n_tracings: np.ndarray
) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "person_id": pids,
            "sex": p.sex.astype(object),
            "site": cfg.sites.name[p.site],
            "birth_date": _days(p.birth),
            "entry_date": _days(p.entry),
            "age_at_entry": p.age0,
            "true_pr_baseline_ms": p.pr0,
            "pr_drift_ms_per_year": p.pr_slope,
            "first_degree_onset": _days(np.floor(p.first_onset)),
            "first_degree_prevalent": p.first_onset <= p.entry,
            "marked_first_degree_onset": _days(np.floor(p.marked_onset)),
            "higher_grade_onset": _days(np.floor(p.hg_onset)),
            "higher_grade_type": _names(HG_TYPES, p.hg_type),
            "advanced_block_onset": _days(np.floor(p.advanced_onset)),
            "third_degree_onset": _days(np.floor(p.third_onset)),
            "escape_if_third_degree": np.where(
                p.escape_junctional, "junctional", "ventricular"
            ).astype(object),
            "pacemaker_date": _days(p.pm_date),
            "pacemaker_prevalent": p.pm_indication == 3,
            "pacemaker_indication": _names(tuple(PM_INDICATIONS[1:]), p.pm_indication - 1),
            "pacemaker_device": _names(DEVICES, p.pm_device),
            "pacemaker_procedure_recorded": p.pm_recorded
            & np.isfinite(p.pm_date)
            & (p.pm_indication != 3),
            "defibrillator_date": _days(p.icd_date),
            "af_onset": _days(np.floor(p.af_onset)),
            "af_persistent": p.af_persistent & np.isfinite(p.af_onset),
            "vc_baseline": _names(VC_CODES, p.vc0),
            "vc_later": _names(VC_CODES, np.where(np.isfinite(p.vc_change), p.vc1, -1)),
            "vc_change_date": _days(np.floor(p.vc_change)),
            "death_date": _days(p.death),
            "followup_end": _days(p.end),
            "end_reason": END_REASONS[p.end_reason].astype(object),
            "lp_higher_grade": p.lp_hg,
            "lp_pacemaker_other": p.lp_pmo,
            "lp_death": p.lp_death,
            "lp_af": p.lp_af,
            "n_tracings": n_tracings.astype(np.int32),
        }
    )


def ecg_truth_frame(
    cfg: Config,
    p: Persons,
    tr: Tracings,
    reads: Reads,
    strips: Strips,
    ids: pl.Series,
    pids: pl.Series,
) -> pl.DataFrame:
    ms = np.round(tr.t * 86_400.0).astype(np.int64) * 1000
    first = np.ones(tr.n, dtype=bool)
    first[1:] = tr.person[1:] != tr.person[:-1]
    return pl.DataFrame(
        {
            "tracing_id": ids,
            "person_id": pids.gather(tr.person),
            "sex": p.sex[tr.person].astype(object),
            "first_of_person": first,
            "acquired_at": pl.Series(ms).cast(pl.Datetime("ms")),
            "event": np.array(EVENTS, dtype=object)[tr.event],
            "age": tr.age,
            "rhythm": np.array(RHYTHM_CODES, dtype=object)[tr.rhythm],
            "av_category": np.array(AV_CODES, dtype=object)[tr.av],
            "ventricular_conduction": np.array(VC_CODES, dtype=object)[tr.vc],
            "blocked_pac": tr.blocked_pac,
            "true_pr_ms": tr.pr,
            "true_qrs_ms": tr.qrs,
            "true_qrs_axis": tr.qrs_axis,
            "true_atrial_rate": tr.atrial_rate,
            "true_vent_rate": tr.vent_rate,
            "has_confirmed": reads.has_confirmed,
            "machine_av_statement": _names(cfg.lexicon.concepts, reads.machine_av_concept),
            "machine_statements": _slot_names(cfg, reads.machine.slots),
            "confirmed_statements": _slot_names(cfg, reads.confirmed.slots).zip_with(
                pl.Series(reads.has_confirmed), pl.Series([None], dtype=pl.String)
            ),
            "beat_pattern": pl.Series(strips.pattern.tolist(), dtype=pl.String).replace("", None),
            "strip_ratio": pl.Series(strips.ratio.tolist(), dtype=pl.String).replace("", None),
            "strip_artefacts": pl.Series(strips.artefacts.tolist(), dtype=pl.String).replace(
                "", None
            ),
            "strip_duration_ms": strips.duration_ms,
        }
    ).with_columns(pl.col("true_pr_ms", "true_atrial_rate", "strip_duration_ms").fill_nan(None))
