-- Registry schema: canonical tables every later stage reads.
-- Canonical units: ms, bpm, degrees (frontal axes in (-180, 180]); dates as DATE, acquisition
-- as TIMESTAMP. Unique keys are enforced by the loader (sql/staging/classify.sql) and checked
-- by tests, not by indexes, which would slow bulk loads of millions of rows.
-- Keys are text so that source identifiers (or their keyed hashes) pass through unchanged.

CREATE TABLE IF NOT EXISTS person (  -- person_key unique: enforced by the loader
    person_key   VARCHAR NOT NULL,
    birth_date   DATE NOT NULL,
    sex          VARCHAR NOT NULL CHECK (sex IN ('F', 'M', 'U')),
    site         VARCHAR,
    death_date   DATE,
    followup_end DATE NOT NULL,
    source_id    VARCHAR NOT NULL
);

-- One row per read of a tracing; a confirmed (overread) read and the machine read of the same
-- tracing share ecg_key. The view ecg_read picks the one used downstream.
CREATE TABLE IF NOT EXISTS ecg (  -- uniqueness of (ecg_key, read_kind) is enforced by the loader
    ecg_key          VARCHAR NOT NULL,
    person_key       VARCHAR NOT NULL,
    acquired_at      TIMESTAMP NOT NULL,
    site             VARCHAR,
    read_kind        VARCHAR NOT NULL CHECK (read_kind IN ('machine', 'confirmed')),
    ventricular_rate DOUBLE,
    atrial_rate      DOUBLE,
    pr_ms            DOUBLE,
    qrs_ms           DOUBLE,
    qt_ms            DOUBLE,
    qtc_ms           DOUBLE,
    p_axis           DOUBLE,
    qrs_axis         DOUBLE,
    t_axis           DOUBLE,
    statements       VARCHAR[],
    statement_codes  VARCHAR[],
    source_id        VARCHAR NOT NULL
);

CREATE TABLE IF NOT EXISTS wave_event (
    ecg_key   VARCHAR NOT NULL,
    t_ms      DOUBLE NOT NULL,
    kind      VARCHAR NOT NULL CHECK (kind IN ('P', 'QRS')),
    source_id VARCHAR NOT NULL
);

CREATE TABLE IF NOT EXISTS procedure (
    person_key  VARCHAR NOT NULL,
    date        DATE NOT NULL,
    code_system VARCHAR NOT NULL,
    code        VARCHAR NOT NULL,
    source_id   VARCHAR NOT NULL
);

CREATE TABLE IF NOT EXISTS diagnosis (
    person_key  VARCHAR NOT NULL,
    date        DATE NOT NULL,
    code_system VARCHAR NOT NULL,
    code        VARCHAR NOT NULL,
    source_id   VARCHAR NOT NULL
);

-- One row per offending field of a rejected record (a record may have several reasons).
CREATE TABLE IF NOT EXISTS quarantine (
    source_id VARCHAR NOT NULL,
    record    BIGINT NOT NULL,
    field     VARCHAR,
    raw_value VARCHAR,
    reason    VARCHAR NOT NULL
);

-- Values changed at ingest by an unambiguous rule (e.g. PR given in seconds).
CREATE TABLE IF NOT EXISTS repair (
    source_id      VARCHAR NOT NULL,
    record         BIGINT NOT NULL,
    field          VARCHAR NOT NULL,
    raw_value      VARCHAR,
    repaired_value VARCHAR,
    rule           VARCHAR NOT NULL
);

-- Records not loaded because the registry already holds them (or an earlier row of the file).
CREATE TABLE IF NOT EXISTS duplicate (
    source_id VARCHAR NOT NULL,
    record    BIGINT NOT NULL,
    key       VARCHAR,
    reason    VARCHAR NOT NULL
);

CREATE TABLE IF NOT EXISTS load_log (
    source_id         VARCHAR PRIMARY KEY,
    source_file       VARCHAR NOT NULL,
    source_kind       VARCHAR NOT NULL,
    target_table      VARCHAR NOT NULL,
    sha256            VARCHAR NOT NULL,
    mapping_hash      VARCHAR NOT NULL,
    rows_read         BIGINT NOT NULL,
    rows_loaded       BIGINT NOT NULL,
    rows_quarantined  BIGINT NOT NULL,
    rows_duplicate    BIGINT NOT NULL,
    rows_repaired     BIGINT NOT NULL,
    pseudonymized     BOOLEAN NOT NULL,
    key_check         VARCHAR,  -- keyed hash of a fixed text: detects a changed key, reveals nothing
    loaded_at         TIMESTAMP NOT NULL,
    seconds           DOUBLE NOT NULL,
    software_version  VARCHAR NOT NULL,
    CHECK (rows_read = rows_loaded + rows_quarantined + rows_duplicate)
);

-- The read used downstream: the confirmed read where one exists, else the machine read.
CREATE OR REPLACE VIEW ecg_read AS
SELECT * EXCLUDE (read_rank)
FROM (
    SELECT *,
           row_number() OVER (
               PARTITION BY ecg_key
               ORDER BY CASE read_kind WHEN 'confirmed' THEN 0 ELSE 1 END
           ) AS read_rank
    FROM ecg
)
WHERE read_rank = 1;
