-- beat_pattern: the beat-level AV conduction pattern of every strip in wave_event.
-- Grain: one row per ecg_key. Written by cohort/phenotype/beats_batch.py (recreated on each
-- write, keeping the rows of unchanged strips); the phenotype stage joins it into the per-ECG
-- categories as evidence "beat pattern".
-- pattern is a key of cohort.vocabulary.BEAT_PATTERNS; rates in bpm, PR in ms; evidence holds
-- machine-readable reasons followed by one human sentence; rules_id names the rule file.
CREATE OR REPLACE TABLE beat_pattern (
    ecg_key          VARCHAR NOT NULL PRIMARY KEY,
    pattern          VARCHAR NOT NULL CHECK (pattern IN (
        'normal', 'first_degree', 'mobitz_i', 'mobitz_ii', 'two_to_one', 'high_grade',
        'third_degree', 'blocked_pac', 'av_dissociation', 'indeterminate')),
    ratio            VARCHAR,
    atrial_rate      DOUBLE,
    ventricular_rate DOUBLE,
    escape_rate      DOUBLE,
    pr_median_ms     DOUBLE,
    n_p              INTEGER NOT NULL,
    n_qrs            INTEGER NOT NULL,
    n_not_conducted  INTEGER NOT NULL,
    evidence         VARCHAR[] NOT NULL,
    rules_id         VARCHAR NOT NULL
);
